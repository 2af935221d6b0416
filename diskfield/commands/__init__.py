"""One module per ``diskfield`` sub-command (see ``diskfield.cli``)."""
