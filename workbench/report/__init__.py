"""HTML report: templates and plot functions."""
