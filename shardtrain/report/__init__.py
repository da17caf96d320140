"""Stage 5, report: text tables, PNG plots and the HTML report."""
