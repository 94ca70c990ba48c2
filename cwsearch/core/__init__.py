"""cwsearch.core."""
