"""Stage 9, the report: its records (`report_data`), building and writing it (`report`)
and its plots (`plots`).
"""
