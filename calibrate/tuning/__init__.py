"""Stage 8, the search for settings: the search space and minimum-impact grids
(`search_space`), scoring one setting and the joint solve (`evaluate`), the study
(`search`), stored studies (`studies`), rolling validation (`rolling`) and what `tune`
prints (`summaries`).
"""
