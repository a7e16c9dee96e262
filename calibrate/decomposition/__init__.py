"""Stage 3, the normal pattern: a compiled port of statsmodels' STL/MSTL and the remainder
streams of trailing-window fits, hour by hour.

`loess` holds the compiled building blocks (LOESS, moving average, robustness weights)
both STL kernels share; `stl_core` is the generic kernel and `stl_plan` the faster
weight-reuse kernel; `stl` is the fitting API (`stl_fit`, `stl_fit_windows`, `mstl_fit`);
`smoother` the linear-smoother matrices of non-robust fits; `decompose` the remainder
streams.
"""
