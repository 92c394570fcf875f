"""Opening a workspace: URLs, storage options (given or from the environment), the
contained local store, and the root group's checks; plus reading one node safely."""

from __future__ import annotations

import json
import os
import threading
from typing import Any

import zarr

from . import _zarr
from .layout import _MARK, _TOP_GROUPS, _check_url, check_mark, new_mark
from .safety import ContainedLocalStore, _check_linked_metadata, _check_safe, _check_stored_node
from ..errors import InputError, LayoutError, NotFound, OutputExists, not_writable, problem, unwritable

#: Environment variable holding storage options (JSON, or ``@path`` of a JSON file) for
#: workspaces on fsspec URLs; see :func:`resolve_storage_options`.
STORAGE_OPTIONS_ENV = "ATOMLINE_STORAGE_OPTIONS"


class StoreMixin:
    """The opened root group, its URL and options, and safe access to its nodes."""

    def __init__(self, root: zarr.Group, url: str, storage_options: dict | None = None):
        self.root = root
        self.url = url
        self.storage_options = storage_options

    # ------------------------------------------------------------------ opening
    @classmethod
    def open(
        cls,
        url: str | os.PathLike,
        *,
        create: bool = False,
        storage_options: dict | None = None,
    ) -> "Workspace":
        """Open a workspace, or create one.

        Parameters
        ----------
        url : str or path
            Local directory or fsspec URL (``memory://…``, ``s3://…``).
        create : bool
            Create an empty workspace if none is there (an existing one is opened).
        storage_options : dict, optional
            Passed to fsspec (credentials, endpoint). Never written into the workspace.

        Returns
        -------
        Workspace

        Raises
        ------
        LayoutError
            The store holds something that is not an atomline workspace, or a layout
            version this atomline does not know.
        NotFound
            No workspace at ``url`` and ``create`` is false.
        """
        url = _check_url(os.fspath(url), "workspace URL")
        storage_options = resolve_storage_options(url, storage_options)
        # A local directory (a path or file:// URL) takes no storage options: its store is ours.
        kwargs = {"storage_options": storage_options} if storage_options and _local_dir(url) is None else {}
        try:
            root = zarr.open_group(store=_store(url, "r+"), mode="r+", **kwargs)
        except (FileExistsError, NotADirectoryError) as exc:  # a local file, not a directory
            raise LayoutError(problem(f"workspace {url}", "a workspace directory", "a file",
                                      "Point atomline at the workspace's directory.")) from exc
        except (FileNotFoundError, zarr.errors.GroupNotFoundError) as exc:
            if not create:
                raise NotFound(problem(f"workspace {url}", "an atomline workspace",
                                       "nothing there",
                                       "Create one first (atomline add-records or demo).")) from exc
            if not _is_empty_place(url, storage_options):
                raise LayoutError(problem(f"workspace {url}", "an empty place or a workspace",
                                          "other files there",
                                          "Choose a new directory or URL.")) from exc
            root = zarr.open_group(store=_store(url, "a"), mode="a", zarr_format=3, **kwargs)
            root.attrs[_MARK] = new_mark()
            for top in _TOP_GROUPS:
                root.require_group(top)
            return cls(root, url, storage_options)
        except (ValueError, TypeError, KeyError) as exc:  # unreadable root metadata
            raise LayoutError(problem(f"workspace {url}", "readable Zarr group metadata",
                                      f"{type(exc).__name__}: {exc}",
                                      "Point atomline at its own workspace.")) from exc
        check_mark(root, url)
        return cls(root, url, storage_options)

    def _reread_root(self) -> bool:
        """Read the root group's metadata again through the open store.

        Zarr keeps a group's attributes in memory from when it was opened, so a workspace
        kept open would show the promoted pointer as it was then, after another object or
        process moved it. Returns False, and changes nothing, when the root is gone (a
        deleted directory, a cleared ``memory://`` store) or is no workspace any more.
        """
        try:
            root = zarr.open_group(store=self.root.store, path=self.root.path or None, mode="r+")
            check_mark(root, self.url)
        except (OSError, zarr.errors.GroupNotFoundError, ValueError, TypeError, KeyError, LayoutError):
            return False
        self.root = root
        return True

    def _mark(self) -> dict:
        return dict(self.root.attrs[_MARK])

    def _node(self, path: str, what: str) -> Any:
        _check_stored_node(self.root.store, f"{self.root.store_path.path}/{path}", path)
        try:
            present = path in self.root
            node = self.root[path] if present else None
        except (ValueError, TypeError, KeyError) as exc:  # metadata zarr cannot parse
            raise LayoutError(problem(path, f"a readable {what}", f"{type(exc).__name__}: {exc}"[:300],
                                      "The store was altered or written by something else.")) from exc
        if not present:
            raise NotFound(problem(path, f"an existing {what}", "nothing at that path",
                                   f"List the workspace (atomline show {self.url}) for what is there."))
        if isinstance(node, zarr.Array):
            _check_safe(node, path)
        return node

    def _refuse_existing(self, path: str, overwrite: bool) -> None:
        if path in self.root and not overwrite:
            raise OutputExists(problem(path, "a free name", "an existing entry",
                                       "Pick another name or pass overwrite=True (--overwrite)."))


# ---------------------------------------------------------------------- one open per process

#: Workspaces opened by :func:`open_workspace`, by URL and storage options.
_OPENED: dict[tuple[str, str], Any] = {}
_OPENED_LOCK = threading.Lock()


def open_workspace(workspace: "Workspace | str | os.PathLike",
                   storage_options: dict | None = None) -> "Workspace":
    """The workspace a stage or flow works on, opened once per process.

    Every stage takes a workspace or its URL; a URL is opened here, and the same URL with
    the same storage options gets the same :class:`Workspace` object back in this
    process (threads included), so a flow's tasks do not each open the store again.
    Handing it out re-reads the root group's metadata (the promoted pointer may have
    moved); a root that is gone is opened afresh, which raises
    :class:`~atomline.stages.errors.NotFound` if nothing is there.

    Parameters
    ----------
    workspace : Workspace, str or path
        An opened workspace (returned as it is) or its URL.
    storage_options : dict, optional
        As for :meth:`Workspace.open`; resolved the same way (the environment otherwise).

    Returns
    -------
    Workspace
    """
    from . import Workspace  # the composed class lives in the package's __init__, which imports this module

    if isinstance(workspace, Workspace):
        return workspace
    url = _check_url(os.fspath(workspace), "workspace URL")
    options = resolve_storage_options(url, storage_options)
    # Kept in this process's memory only, never written anywhere (the options may hold secrets).
    key = (url, json.dumps(options, sort_keys=True, default=repr) if options else "")
    with _OPENED_LOCK:  # one open at a time: two threads asking together share one object
        ws = _OPENED.get(key)
        if ws is not None and ws._reread_root():
            return ws
        _OPENED.pop(key, None)
        ws = Workspace.open(url, storage_options=options)
        _OPENED[key] = ws
        return ws


# ---------------------------------------------------------------------- validation

def resolve_storage_options(url: str, given: dict | None = None) -> dict | None:
    """Storage options (credentials, endpoint) for a workspace or store URL.

    Flows take the workspace as a URL only, because Prefect records flow parameters; the
    options reach every process that opens the store (flow, thread, process or Dask
    worker) through its environment instead:

    1. ``given`` — options passed in code (Python API); used as they are;
    2. else ``$ATOMLINE_STORAGE_OPTIONS``: a JSON object, or ``@/path/to/options.json``;
    3. else none: fsspec and s3fs find credentials their own way (fsspec's
       ``FSSPEC_S3_*`` variables and config files, ``AWS_*`` variables, profiles, roles).

    Options are never written into the workspace, a log or an error message.

    Parameters
    ----------
    url : str
        Local path or fsspec URL.
    given : dict, optional

    Returns
    -------
    dict or None
        ``None`` for local paths and when nothing is configured.

    Raises
    ------
    InputError
        The environment holds something other than a JSON object (the value itself is
        not repeated in the message). URLs carrying credentials are refused on opening.
    """
    url = str(url)
    if "://" not in url:
        return None
    if given:
        return dict(given)
    text = os.environ.get(STORAGE_OPTIONS_ENV, "").strip()
    if not text:
        return None
    where = f"${STORAGE_OPTIONS_ENV}"
    if text.startswith("@"):
        where = f"storage options file {text[1:]}"
        try:
            with open(text[1:], encoding="utf-8") as fh:
                text = fh.read()
        except OSError as exc:
            raise InputError(problem(where, "a readable JSON file", type(exc).__name__,
                                     "Check the path after '@'.")) from None
    try:
        options = json.loads(text)
    except json.JSONDecodeError:
        options = None
    if not isinstance(options, dict):
        raise InputError(problem(where, "a JSON object of fsspec storage options",
                                 "something else (value not shown: it may hold secrets)",
                                 'Set it to e.g. {"client_kwargs": {"endpoint_url": "..."}}.'))
    return options


def _local_dir(url: str) -> str | None:
    """The directory of a local path or ``file://`` URL; None for any other URL."""
    if url.startswith("file://"):
        return url[len("file://"):]
    return None if "://" in url else url


def _store(url: str, mode: str) -> Any:
    """What Zarr opens for a workspace URL: a local directory (path or ``file://``) through
    the store that keeps every key inside it (:class:`._safety.ContainedLocalStore`), any
    other URL as it is."""
    directory = _local_dir(url)
    if directory is None:
        return url
    try:
        return _zarr.run(ContainedLocalStore.open(directory, mode=mode))
    except OSError as exc:  # creating the directory on a read-only mount
        if unwritable(exc):
            raise not_writable(f"workspace {url}", exc) from exc
        raise


def _open_array(url: str, path: str, storage_options: dict | None) -> zarr.Array:
    storage_options = resolve_storage_options(url, storage_options)
    kwargs = {"storage_options": storage_options} if storage_options and "://" in str(url) else {}
    _check_linked_metadata(str(url), str(path), storage_options)
    try:
        node = zarr.open(store=url, path=path or None, mode="r", **kwargs)
    except Exception as exc:  # zarr raises several kinds for a missing or foreign node
        raise NotFound(problem(f"{url}:{path}", "a readable Zarr array", f"{type(exc).__name__}: {exc}",
                               "Check the URL, the array path and the credentials.")) from exc
    if not isinstance(node, zarr.Array):
        raise InputError(problem(f"{url}:{path}", "a Zarr array", "a group",
                                 "Give the path of the array inside the store."))
    _check_safe(node, f"linked array {url}:{path}")
    return node


def _is_empty_place(url: str, storage_options: dict | None) -> bool:
    if "://" not in url:
        return not os.path.exists(url) or not os.listdir(url)
    import fsspec

    fs, path = fsspec.core.url_to_fs(url, **(storage_options or {}))
    try:
        return not fs.exists(path) or not fs.ls(path)
    except FileNotFoundError:
        return True
