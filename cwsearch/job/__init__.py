"""cwsearch.job."""
