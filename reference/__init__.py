"""Published data tables and constants, each file citing its source in its header."""
