"""Command-line floor: the ``spatial-ev`` commands. Each command parses its options, calls the
library and prints progress and errors; nothing below this floor prints."""
