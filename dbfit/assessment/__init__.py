"""Assessment on held-out rows, model comparison and the HTML report."""
