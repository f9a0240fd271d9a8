"""filmmap: oxide thickness maps and furnace-run advice from optical spectra."""

__version__ = "0.1.0"
