"""cwsearch.inference."""
