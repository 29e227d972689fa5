"""One module per ``lodemap`` sub-command (see ``mapping.cli``)."""
