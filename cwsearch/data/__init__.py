"""cwsearch.data."""
