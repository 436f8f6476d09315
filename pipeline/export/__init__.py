"""Training arrays from a finished run: piano-roll or performance-event shards, and a loader.

``build``      ``midisift export``: reads an output folder, writes ``OUTPUT/export/<format>/``
``encodings``  the piano roll and the performance-event encoding (with its decoder)
``loader``     ``open_export``: (key, array) pairs of a part, one shard open at a time
``freshness``  whether an export still describes its output folder (the loader and the run check)
``png``        a grayscale PNG writer (numpy + zlib) for previews and the report's thumbnails
"""
from .build import ExportOptions, ExportResult, export_output
from .loader import ExportFolder, open_export

__all__ = ["ExportOptions", "ExportResult", "export_output", "ExportFolder", "open_export"]
