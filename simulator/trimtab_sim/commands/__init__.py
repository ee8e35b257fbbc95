"""One module a sub-command of trimtab-sim."""
