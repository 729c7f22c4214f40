"""Reading and writing recordings."""

from beatlab.io.readers import open_recording
from beatlab.io.recording import KINDS, Recording
from beatlab.io.writers import atomic_path, write_json, write_ome_tiff

__all__ = ["KINDS", "Recording", "atomic_path", "open_recording", "write_json", "write_ome_tiff"]
