"""Reading and writing recordings."""

from beatlab.io.readers import open_recording
from beatlab.io.recording import KINDS, Recording
from beatlab.io.writers import (
    atomic_path,
    check_output_dir,
    check_output_file,
    write_json,
    write_ome_tiff,
)

__all__ = [
    "KINDS",
    "Recording",
    "atomic_path",
    "check_output_dir",
    "check_output_file",
    "open_recording",
    "write_json",
    "write_ome_tiff",
]
