"""Run folders: HDF5 results, JSON summaries, checkpoints, plots and HTML reports."""
