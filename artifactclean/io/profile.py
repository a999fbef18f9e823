"""Rig profiles: what ``survey`` found, saved as a small TOML file that ``clean`` accepts.

A lab surveys one recording per rig, checks the result, and passes the
profile to later runs so format, stream, channels, monitor channel,
stimulation frequency and cleaning method are set once.
"""

from __future__ import annotations

import sys
from pathlib import Path

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = ["save_profile", "load_profile", "PROFILE_KEYS"]

#: sections and keys a profile may hold
PROFILE_KEYS = {
    "recording": {"format", "stream", "channels", "monitor_channel"},
    "stimulation": {"nominal_freq_hz", "frequencies_hz", "blocks", "events"},
    "cleaning": {"method", "params"},
}


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(float(v)) if isinstance(v, float) else str(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(f"cannot write {type(v).__name__} to a profile")


def save_profile(path, profile: dict, *, force: bool = False) -> Path:
    """Write ``profile`` (sections of :data:`PROFILE_KEYS`) as TOML; refuses to overwrite without ``force``."""
    path = Path(path)
    if path.exists() and not force:
        raise ValueError(f"{path} exists; pass --force to overwrite")
    lines = ["# artifactclean rig profile: written by `artifactclean survey`, read by `clean`"]
    for section, keys in PROFILE_KEYS.items():
        body = profile.get(section, {})
        simple = {k: v for k, v in body.items() if k in keys and v is not None and not isinstance(v, dict)}
        tables = {k: v for k, v in body.items() if k in keys and isinstance(v, dict)}
        lines.append(f"\n[{section}]")
        lines += [f"{k} = {_value(v)}" for k, v in simple.items()]
        for k, v in tables.items():
            lines.append(f"\n[{section}.{k}]")
            lines += [f"{kk} = {_value(vv)}" for kk, vv in v.items() if vv is not None]
    tmp = path.with_name(f".{path.name}.partial")
    tmp.write_text("\n".join(lines) + "\n")
    tmp.replace(path)
    return path


def load_profile(path) -> dict:
    """Read a rig profile; unknown sections or keys are an error naming them."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text())
    except FileNotFoundError:
        raise ValueError(f"no profile at {path}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ValueError(f"{path} is not valid TOML: {exc}") from None
    for section, body in data.items():
        if section not in PROFILE_KEYS:
            raise ValueError(f"{path}: unknown section [{section}]; sections are {sorted(PROFILE_KEYS)}")
        unknown = set(body) - PROFILE_KEYS[section]
        if unknown:
            raise ValueError(f"{path}: unknown key(s) {sorted(unknown)} in [{section}]")
    return data
