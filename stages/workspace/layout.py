"""The workspace layout: its version, what each entry must carry, and the names, paths
and URLs that may appear in it (the layout itself is drawn in the package docstring)."""

from __future__ import annotations

import datetime as _dt
from typing import Any

import numpy as np

from .safety import require_attrs
from ..errors import InputError, LayoutError, problem

#: Version of the layout. A store with a larger number was written by a newer
#: atomline and is refused rather than misread.
LAYOUT_VERSION = 1
_MARK = "atomline"
#: Groups every workspace has from its creation on.
_TOP_GROUPS = ("data", "labels", "dictionaries", "codes", "features", "evaluations")
#: Attributes each kind of entry must carry, with their JSON types.
_RECORDS_ATTRS = {"fingerprint": str}
_LINK_ATTRS = {"fingerprint": str, "link": dict, "shape": list, "dtype": str}
_DICTIONARY_ATTRS = {"fingerprint": str, "prep_arrays": list}
_DICTIONARY_OPTIONAL = {"preprocessing": dict, "geometry": dict, "coder": str, "coder_options": dict,
                        "n_atoms": int, "n_features": int, "method": str}
_OUTPUT_ATTRS = {
    "codes": {"fingerprint": str, "records": str, "dict_id": str, "records_fingerprint": str,
              "dictionary_fingerprint": str, "params": dict, "patches_per_record": int,
              "record_chunk_rows": int, "geometry": dict, "n_atoms": int, "width": int},
    "features": {"fingerprint": str, "records": str, "dict_id": str, "codes_fingerprint": str,
                 "coder": str, "params": dict, "n_features": int, "n_regions": int},
}
_EVALUATION_ATTRS = {"run_id": str, "dict_id": str, "records": str, "metrics": dict}


def _package_version() -> str:
    try:
        from importlib.metadata import version

        return version("atomline")
    except Exception:  # running from a source tree that was never installed
        return "unknown"



def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _check_output_path(path: str) -> str:
    """Output paths are ``codes|features/<dict-id>/<records>``: nothing may escape them."""
    parts = path.split("/") if isinstance(path, str) else []
    if len(parts) != 3 or parts[0] not in _OUTPUT_ATTRS:
        raise InputError(problem("output path", "codes/<dict-id>/<records> or features/<dict-id>/<records>",
                                 repr(path), "Use the stage's codes_path/features_path."))
    for part in parts[1:]:
        _check_name(part, f"output path {path!r}")
    return path


def _check_name(name: str, what: str) -> str:
    """Names become path segments: refuse anything that could escape its folder."""
    if (
        not isinstance(name, str)
        or not name
        or name in {".", ".."}
        or any(c in name for c in "/\\\0")
        or any(ord(c) < 32 or ord(c) == 127 for c in name)  # newlines, tabs, escapes
        or name.startswith(".")
    ):
        raise InputError(problem(what, "a plain name (letters, digits, '-', '_')", repr(name),
                                 "Choose a name without slashes, control characters or leading dots."))
    return name


def _check_url(url: str, what: str) -> str:
    """Refuse URLs that carry credentials or climb out of their base with '..'."""
    if not isinstance(url, str) or not url or "\0" in url:
        raise InputError(problem(what, "a directory or fsspec URL", repr(url), "Give a URL."))
    if "://" in url:
        protocol, rest = url.split("://", 1)
        authority = rest.split("/", 1)[0]
        if "@" in authority:
            raise InputError(problem(what, "a URL without credentials", f"{protocol}://…@… (user info in the URL)",
                                     "Pass credentials through storage_options; they are never stored."))
        if ".." in rest.split("/"):
            raise InputError(problem(what, "a URL without '..' segments", repr(url),
                                     "Write the URL without '..'."))
    return url


def _check_array_path(path: str) -> str:
    """An array path inside a store: relative, no '..', no backslashes."""
    if not isinstance(path, str) or path.startswith("/") or "\\" in path or "\0" in path \
            or ".." in path.split("/") or "://" in path:
        raise InputError(problem("array path", "a relative path inside the store (no '..', no leading '/')",
                                 repr(path), "Give the path of the array inside its store."))
    return path


def _plain(value: Any) -> Any:
    """Deep-convert to plain JSON types (a numpy scalar would poison Zarr attributes)."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    return value


def new_mark() -> dict:
    """The root attribute of a new workspace: layout version, no promoted dictionary."""
    return {"layout": LAYOUT_VERSION, "promoted": None, "created": _now(), "version": _package_version()}


def check_mark(root: Any, url: str) -> None:
    """Refuse a root group that is not an atomline workspace of a layout this code reads.

    Raises
    ------
    LayoutError
    """
    mark = root.attrs.get(_MARK)
    if root.metadata.zarr_format != 3:
        raise LayoutError(problem(f"workspace {url}", "a Zarr v3 group",
                                  f"Zarr format {root.metadata.zarr_format}",
                                  "atomline workspaces are Zarr v3; link v2 arrays with link_records."))
    if not isinstance(mark, dict) or not isinstance(mark.get("layout"), int) or isinstance(mark.get("layout"), bool):
        raise LayoutError(problem(f"workspace {url}", f"a root attribute '{_MARK}' with a layout number",
                                  "a Zarr group written by something else",
                                  "Point atomline at its own workspace; link foreign arrays with link_records."))
    if mark["layout"] > LAYOUT_VERSION:
        raise LayoutError(problem(f"workspace {url}", f"layout version ≤ {LAYOUT_VERSION}",
                                  f"version {mark['layout']}",
                                  "Upgrade atomline to read this workspace."))
    require_attrs(mark, {"promoted": (str, type(None))}, f"workspace {url}, root {_MARK!r}")
