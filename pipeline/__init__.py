"""midisift: prepare MIDI training corpora (import package ``pipeline``)."""
__version__ = "0.4.8"
