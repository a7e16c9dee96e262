"""Stage 9, the report: its records (`report_data`), its content (`build`), the pages
and summary it renders (`render`, with `formats` for values as text), its plots
(`plots`) and writing the files (`report`).
"""
