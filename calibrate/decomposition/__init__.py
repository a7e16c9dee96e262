"""Stage 3, the normal pattern: the compiled STL kernel (`stl_kernel`) and the remainder
streams of trailing-window fits, hour by hour (`decompose`).
"""
