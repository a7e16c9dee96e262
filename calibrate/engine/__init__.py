"""Stage 5, the replay: worker pools, local or Dask (`executors`), and the hour-by-hour
replay of every level and metric (`replay`).
"""
