"""Everything that draws: plots and the HTML report."""
