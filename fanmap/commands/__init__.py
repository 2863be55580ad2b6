"""One module per ``fanmap`` sub-command; see :mod:`fanmap.cli`."""
