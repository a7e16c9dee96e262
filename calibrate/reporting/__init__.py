"""Stage 9, the report: its records (`report_data`), computing them (`build`), how
values are written (`formats`), rendering the pages (`render`) and plots (`plots`),
and writing the folder (`report`).
"""
