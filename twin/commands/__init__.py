"""One module per ``twin`` command (see ``twin.cli``)."""
