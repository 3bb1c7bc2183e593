"""Report stage: the HTML report, its plots and the terminal summary of a run folder."""
