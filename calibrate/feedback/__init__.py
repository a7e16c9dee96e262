"""Stage 9, analysts' feedback: the alerts export for review (`review`), the review
page's data and app (`review_data`, `review_app`) and re-tuning from verdicts (`retune`).
"""
