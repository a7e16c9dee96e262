"""Stage 6, scoring: alerts against incidents.

`matching` holds the event rule (which alert catches which incident); `intervals` the
Wilson and bootstrap intervals; `tables` the figures per group and the weekly volume;
`figures` one configuration's figures and the out-of-sample verdict; `curves` the
figures over a multiplier grid and the multiplier solves; `tradeoffs` alert load as one
number and the Pareto fronts; `alerts_file` an alerts frame read back into episodes.
"""
