"""Stages 1-2, the inputs: the workspace config (`workspace`), where the history comes
from (`sources`), the hourly history arrays (`history`), who owns which series
(`owners`), the labelled incidents (`incidents`) and the pre-flight checks (`checks`).
"""
