"""Reports: plots and tables of a run."""
