"""Results: the run store, the results database, plots and the HTML report."""
