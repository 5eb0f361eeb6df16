"""The burst link: the terminal and master endpoints, their decision tables, fragment policies."""
