"""summary.csv, report.html and the figures."""
