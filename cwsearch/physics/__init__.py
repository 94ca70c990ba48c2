"""cwsearch.physics."""
