"""Reading recordings (neo rawio, arrays, neo objects) and writing cleaned ones (.dat/.bin, .nix)."""

from .pipeline import clean_recording, scan_recording, survey_recording
from .profile import load_profile, save_profile
from .reader import ArrayRecording, NeoRecording, Recording, open_recording
from .writers import DatWriter, NixWriter, open_writer

__all__ = ["open_recording", "Recording", "ArrayRecording", "NeoRecording", "clean_recording",
           "survey_recording", "scan_recording", "DatWriter", "NixWriter", "open_writer",
           "load_profile", "save_profile"]
