"""cwsearch.stages."""
