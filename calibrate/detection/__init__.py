"""Stage 4, the detector: Tukey fences on remainders and the alert rule (`detectors`),
alert episodes and their raised hours (`episodes`).
"""
