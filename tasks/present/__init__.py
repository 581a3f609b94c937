"""Presentation: plots and readable HTML reports of runs, gates and version comparisons."""
