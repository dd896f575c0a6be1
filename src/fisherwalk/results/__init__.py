"""Reading a run: diagnostics, the summary report, plots."""
