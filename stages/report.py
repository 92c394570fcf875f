"""Pictures of a dictionary and its evaluations, rendered to PNG with matplotlib (Agg).

Two layers:

* renderers — pure functions from arrays to PNG bytes, every picture the same pixel size
  (:data:`SIZE`), no file or workspace access:
  :func:`atoms_png` (waveforms for 1-D atoms, tiles for 2-D), :func:`usage_png`,
  :func:`history_png` (accuracy over retrains), :func:`confusion_png`,
  :func:`curve_png` (learning curve), :func:`search_png` (a search's trials, accuracy
  against cost);
* :func:`render_report` — the stage that reads an evaluation from the workspace, renders
  all of them and stores them under ``reports/<run-id>/`` (see
  ``Workspace.save_picture``).
"""

from __future__ import annotations

import io

import matplotlib

matplotlib.use("Agg")  # no display: render to memory only (before pyplot is imported)
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from .encode import codes_path  # noqa: E402
from .errors import InputError, problem  # noqa: E402
from .gate import best_baseline  # noqa: E402
from .kernels.prep import PatchGeometry  # noqa: E402
from .workspace import Workspace, iter_row_chunks, open_workspace  # noqa: E402

__all__ = ["SIZE", "atoms_png", "usage_png", "history_png", "history_series", "confusion_png",
           "curve_png", "curve_series", "search_png", "atom_usage", "render_report",
           "history_points", "PICTURES"]

#: Pixel size (width, height) of every picture.
SIZE = (960, 720)
_DPI = 120
#: At most this many atoms are drawn (the most used first).
MAX_ATOMS_DRAWN = 64
#: The pictures :func:`render_report` makes, by name, with their titles.
PICTURES = {
    "atoms": "dictionary atoms",
    "usage": "atom usage",
    "history": "accuracy over retrains",
    "confusion": "confusion matrix",
    "learning_curve": "learning curve",
}


def _figure() -> Figure:
    return plt.figure(figsize=(SIZE[0] / _DPI, SIZE[1] / _DPI), dpi=_DPI)


def _png(fig: Figure) -> bytes:
    """PNG bytes of exactly SIZE pixels (no tight bounding box: it would change the size)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI)
    plt.close(fig)
    return buf.getvalue()


def atoms_png(atoms: np.ndarray, geometry: PatchGeometry, order: np.ndarray | None = None,
              title: str = "dictionary atoms") -> bytes:
    """Draw atoms: one small waveform per atom (1-D) or one tile per atom (images).

    Parameters
    ----------
    atoms : ndarray of shape (k, d)
    geometry : PatchGeometry
        Says how a row of length ``d`` is laid out (``size`` and channels).
    order : ndarray of shape (k,), int, optional
        Atoms in the order to draw them (e.g. most used first); the first
        :data:`MAX_ATOMS_DRAWN` are drawn.
    title : str

    Returns
    -------
    bytes
        A PNG file of :data:`SIZE` pixels.
    """
    atoms = np.asarray(atoms, dtype=np.float64)
    if atoms.ndim != 2 or atoms.shape[1] != geometry.n_features:
        raise InputError(problem("atoms", f"shape (k, {geometry.n_features})", str(atoms.shape),
                                 "Pass the dictionary's atoms with its geometry."))
    order = np.arange(atoms.shape[0]) if order is None else np.asarray(order)
    shown = order[:MAX_ATOMS_DRAWN]
    cols = int(np.ceil(np.sqrt(shown.size)))
    rows = int(np.ceil(shown.size / cols))
    fig = _figure()
    ax = fig.add_axes((0.02, 0.02, 0.96, 0.9))
    # One axes for all atoms (a mosaic or one polyline): 64 subplots would take seconds.
    if geometry.n_spatial == 1:
        x, y = _waveform_grid(atoms[shown], rows, cols)
        ax.plot(x, y, lw=0.8, color="tab:blue")
        ax.set_xlim(0, cols)
        ax.set_ylim(rows, 0)
        for r in range(rows + 1):
            ax.axhline(r, lw=0.3, color="0.8")
        for c in range(cols + 1):
            ax.axvline(c, lw=0.3, color="0.8")
    else:
        channels = geometry.record_shape[2] if len(geometry.record_shape) == 3 else 1
        tiles = atoms[shown].reshape(shown.size, *geometry.size, channels)
        ax.imshow(_mosaic(tiles, rows, cols), interpolation="nearest",
                  cmap=None if channels == 3 else "gray", vmin=0, vmax=1)
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_title(f"{title} ({shown.size} of {atoms.shape[0]} shown, most used first)")
    return _png(fig)


def _waveform_grid(atoms: np.ndarray, rows: int, cols: int) -> tuple[np.ndarray, np.ndarray]:
    """One polyline (NaN-separated) placing atom ``i`` in cell ``(i // cols, i % cols)``.

    Returns
    -------
    x, y : ndarray of shape (n_atoms * (d + 1),)
        Coordinates in cell units; each waveform scaled to 90 % of its cell's height.
    """
    n, d = atoms.shape
    scale = np.abs(atoms).max(axis=1, keepdims=True)
    wave = 0.45 * atoms / np.where(scale > 0, scale, 1.0)
    cell = np.arange(n)
    x = (cell % cols)[:, None] + 0.05 + 0.9 * np.arange(d)[None, :] / max(d - 1, 1)
    y = (cell // cols)[:, None] + 0.5 - wave  # image-like rows: first row at the top
    pad = np.full((n, 1), np.nan)
    return np.hstack([x, pad]).ravel(), np.hstack([y, pad]).ravel()


def _mosaic(tiles: np.ndarray, rows: int, cols: int) -> np.ndarray:
    """Tiles (n, h, w, c) scaled each to [0, 1] (0.5 = zero) on a grid with 1-pixel gaps.

    Returns
    -------
    ndarray of shape (rows * (h + 1) + 1, cols * (w + 1) + 1) for one channel, with a
    trailing axis of 3 for colour.
    """
    n, h, w, c = tiles.shape
    scale = np.abs(tiles).reshape(n, -1).max(axis=1)
    scaled = 0.5 + 0.5 * tiles / np.where(scale > 0, scale, 1.0)[:, None, None, None]
    out = np.ones((rows * (h + 1) + 1, cols * (w + 1) + 1, c))
    for i in range(n):  # at most MAX_ATOMS_DRAWN small tiles
        r, q = divmod(i, cols)
        out[1 + r * (h + 1): 1 + r * (h + 1) + h, 1 + q * (w + 1): 1 + q * (w + 1) + w] = scaled[i]
    return out[..., 0] if c == 1 else out


def usage_png(usage: np.ndarray, title: str = "atom usage") -> bytes:
    """Bar chart of how often each atom is used, most used first.

    Parameters
    ----------
    usage : ndarray of shape (k,)
        Nonzero coefficients per atom.
    title : str

    Returns
    -------
    bytes
        PNG of :data:`SIZE` pixels.
    """
    usage = np.asarray(usage, dtype=np.float64)
    share = usage / max(usage.sum(), 1.0)
    ranked = np.sort(share)[::-1]
    fig = _figure()
    ax = fig.add_subplot()
    ax.bar(np.arange(ranked.size), ranked, width=1.0, color="tab:blue")
    ax.axhline(1.0 / max(ranked.size, 1), color="tab:red", lw=1, ls="--", label="uniform use")
    ax.set_xlabel("atoms, most used first")
    ax.set_ylabel("share of nonzero coefficients")
    unused = int((usage == 0).sum())
    ax.set_title(f"{title}: {ranked.size} atoms, {unused} never used")
    ax.legend()
    return _png(fig)


def history_series(history: list[dict]) -> dict[str, np.ndarray]:
    """The lines of :func:`history_png`: accuracy per evaluation of the sparse features,
    the raw records and the best dictionary baseline (NaN where one was not evaluated).

    Parameters
    ----------
    history : list of dict
        As :func:`history_png`.

    Returns
    -------
    dict of str to ndarray of shape (len(history),), float64
        ``features``, ``raw``, ``baseline``.
    """
    def line(key: str) -> np.ndarray:
        return np.array([np.nan if h.get(key) is None else h[key] for h in history], dtype=float)

    return {"features": line("features"), "raw": line("raw"), "baseline": line("baseline")}


def history_png(history: list[dict], title: str = "accuracy over retrains") -> bytes:
    """Accuracy of every evaluation, in order, with the raw records, the best dictionary
    baseline and promotions marked: a simpler dictionary doing better shows at once.

    Parameters
    ----------
    history : list of dict
        Oldest first; each has ``label`` (str), ``features`` (float), and optionally
        ``raw`` and ``baseline`` (float or None: the best of the random-patches and PCA
        dictionaries) and ``promoted`` (bool: this dictionary was promoted).
    title : str

    Returns
    -------
    bytes
        PNG of :data:`SIZE` pixels.
    """
    fig = _figure()
    ax = fig.add_subplot()
    x = np.arange(len(history))
    lines = history_series(history)
    feats = lines["features"]
    ax.plot(x, feats, "o-", color="tab:blue", label="sparse features")
    if np.isfinite(lines["raw"]).any():
        ax.plot(x, lines["raw"], "s--", color="0.5", label="raw records")
    if np.isfinite(lines["baseline"]).any():
        ax.plot(x, lines["baseline"], "^:", color="tab:orange",
                label="best baseline dictionary (random patches or PCA)")
    promoted = np.array([bool(h.get("promoted")) for h in history])
    if promoted.any():
        ax.plot(x[promoted], feats[promoted], "*", ms=14, color="tab:green", label="promoted")
    ax.set_xticks(x, [h["label"] for h in history], rotation=45, ha="right", fontsize=7)
    ax.set_ylim(0, 1.02)
    ax.set_ylabel("accuracy (out-of-fold)")
    ax.set_title(title)
    ax.legend(loc="lower right")
    fig.subplots_adjust(bottom=0.25)
    return _png(fig)


def confusion_png(conf: np.ndarray, classes: list[str], title: str = "confusion matrix") -> bytes:
    """Heat map of a confusion matrix with counts, rows true class.

    Parameters
    ----------
    conf : ndarray of shape (c, c)
    classes : list of str, length c
    title : str

    Returns
    -------
    bytes
        PNG of :data:`SIZE` pixels.
    """
    conf = np.asarray(conf)
    fig = _figure()
    ax = fig.add_subplot()
    share = conf / np.maximum(conf.sum(axis=1, keepdims=True), 1)
    ax.imshow(share, cmap="Blues", vmin=0, vmax=1)
    if conf.shape[0] <= 20:
        for (i, j), n in np.ndenumerate(conf):
            ax.text(j, i, str(int(n)), ha="center", va="center", fontsize=8,
                    color="white" if share[i, j] > 0.5 else "black")
    ax.set_xticks(np.arange(len(classes)), classes, rotation=45, ha="right")
    ax.set_yticks(np.arange(len(classes)), classes)
    ax.set_xlabel("predicted class")
    ax.set_ylabel("true class")
    ax.set_title(title)
    return _png(fig)


def curve_series(curve: dict, baseline: str | None = None) -> dict[str, list[float]]:
    """The lines of :func:`curve_png`: accuracy per training size of the sparse features,
    the raw records and the named baseline dictionary, as far as the curve holds them.

    Parameters
    ----------
    curve : dict
        An evaluation's ``learning_curve``.
    baseline : str, optional
        The baseline dictionary to draw beside raw (:func:`.gate.best_baseline`).

    Returns
    -------
    dict of str to list of float
        By label: ``features``, ``raw``, ``best baseline: <name>``.
    """
    names = [("features", "features"), ("raw", "raw")]
    if baseline is not None:
        names.append((baseline, f"best baseline: {baseline}"))
    return {label: list(curve[name]) for name, label in names if name in curve}


def curve_png(curve: dict, title: str = "learning curve", baseline: str | None = None) -> bytes:
    """Accuracy against the number of labelled training rows.

    Parameters
    ----------
    curve : dict
        ``train_rows`` (list of float) and one list of accuracies per feature set
        (``features``, optionally ``raw`` and the baselines), as in an evaluation's
        ``learning_curve``.
    title : str
    baseline : str, optional
        A baseline dictionary in ``curve`` to draw beside raw (the best one).

    Returns
    -------
    bytes
        PNG of :data:`SIZE` pixels.
    """
    fig = _figure()
    ax = fig.add_subplot()
    for (label, values), style in zip(curve_series(curve, baseline).items(), ("o-", "s--", "^:")):
        ax.plot(curve["train_rows"], values, style, label=label)
    ax.set_xscale("log")
    ax.set_xlabel("labelled training rows (per fold)")
    ax.set_ylabel("accuracy")
    ax.set_ylim(0, 1.02)
    ax.set_title(title)
    ax.legend(loc="lower right")
    return _png(fig)


# ---------------------------------------------------------------------------- stage
def search_png(trials: list[dict], title: str = "search: accuracy against cost") -> bytes:
    """Every trial of a search: accuracy against seconds, one colour per rung, the raw
    records' accuracy on the same rows as a hollow mark beside each rung.

    Parameters
    ----------
    trials : list of dict
        Each with ``rung`` (int), ``score`` and ``raw`` (float, accuracy), ``seconds``
        (float) and ``rows`` (int); failed trials (``score < 0``) are left out.
    title : str

    Returns
    -------
    bytes
        PNG of :data:`SIZE` pixels.
    """
    fig = _figure()
    ax = fig.add_subplot()
    shown = [t for t in trials if t["score"] >= 0]
    for rung in sorted({t["rung"] for t in shown}):
        at = [t for t in shown if t["rung"] == rung]
        ax.scatter([t["seconds"] for t in at], [t["score"] for t in at], s=30,
                   label=f"rung {rung} ({at[0]['rows']} rows)")
        ax.axhline(at[0]["raw"], ls="--", lw=0.8, color=f"C{rung}")
    ax.set_xscale("log")
    ax.set_xlabel("seconds per trial")
    ax.set_ylabel("accuracy (out-of-fold); dashed: raw records on the same rows")
    ax.set_ylim(0, 1.02)
    ax.set_title(title)
    if shown:
        ax.legend(loc="lower right")
    return _png(fig)


def atom_usage(workspace: Workspace | str, dict_id: str, records: str) -> np.ndarray:
    """Nonzero coefficients per atom over all encoded chunks, read chunk by chunk.

    Returns
    -------
    ndarray of shape (k,), int64
    """
    ws = open_workspace(workspace)
    out = ws.output(codes_path(dict_id, records))
    k = out.attrs["n_atoms"]
    index = out.group["index"]
    usage = np.zeros(k, dtype=np.int64)
    for c, rows in iter_row_chunks(index):
        if out.is_done(c):
            idx = np.asarray(index[rows]).ravel()
            usage += np.bincount(idx[idx >= 0], minlength=k)
    return usage


def render_report(workspace: Workspace | str, run_id: str,
                  class_names: list[str] | None = None) -> list[str]:
    """Render every picture of one evaluation and store it under ``reports/<run_id>/``.

    Parameters
    ----------
    workspace : Workspace or str
    run_id : str
        An evaluation's run id.
    class_names : list of str, optional
        Names for the class numbers (in the order of the evaluation's classes).

    Returns
    -------
    list of str
        Workspace paths of the stored pictures.
    """
    ws = open_workspace(workspace)
    evaluations = ws.evaluations()
    ev = next((e for e in evaluations if e["run_id"] == run_id), None)
    if ev is None:
        raise InputError(problem(f"evaluations/{run_id}", "a complete evaluation", "none",
                                 "Pass a run id from the evaluation history."))
    names = class_names or [str(c) for c in ev["classes"]]
    wanted = list(PICTURES) if ev.get("learning_curve") else [n for n in PICTURES if n != "learning_curve"]
    # A rerun (e.g. after a kill) keeps the pictures already stored whole and renders the
    # rest; bytes stored without their attributes are not pictures and are replaced.
    done = {p["name"]: p["path"] for p in ws.pictures() if p["report_id"] == run_id}
    missing = [name for name in wanted if name not in done]
    if not missing:
        return [done[name] for name in wanted]
    stored = ws.load_dictionary(ev["dict_id"])
    geometry = stored.geometry()
    usage = atom_usage(ws, ev["dict_id"], ev["records"])
    makers = {
        "atoms": lambda: atoms_png(stored.atoms, geometry, np.argsort(-usage, kind="stable"),
                                   title=f"atoms of {ev['dict_id']}"),
        "usage": lambda: usage_png(usage, title=f"atom usage of {ev['dict_id']} on {ev['records']}"),
        "history": lambda: history_png(history_points(ws, ev["records"]),
                                       title=f"accuracy over retrains, {ev['records']}"),
        "confusion": lambda: confusion_png(ws.evaluation_arrays(run_id)["confusion_features"], names,
                                           title=f"sparse features, {ev['dict_id']}"),
        "learning_curve": lambda: curve_png(ev["learning_curve"],
                                            baseline=best_baseline(ev, "accuracy")),
    }
    for name in missing:
        done[name] = ws.save_picture(run_id, name, makers[name](),
                                     {"title": PICTURES[name], "width": SIZE[0], "height": SIZE[1],
                                      "dict_id": ev["dict_id"]})
    return [done[name] for name in wanted]


def history_points(ws: Workspace, records: str) -> list[dict]:
    """The accuracy history of ``records`` for :func:`history_png` (oldest first): the
    features, the raw records and the best dictionary baseline of each evaluation."""
    promoted = {d["candidate_run"] for d in ws.decisions() if d.get("promoted")}

    def best(e: dict) -> float | None:
        name = best_baseline(e, "accuracy")
        return None if name is None else e["metrics"][name]["accuracy"]

    return [{"label": f"{e['created'][5:16]} {e['dict_id'][:8]}",
             "features": e["metrics"]["features"]["accuracy"],
             "raw": e["metrics"].get("raw", {}).get("accuracy"),
             "baseline": best(e), "baseline_name": best_baseline(e, "accuracy"),
             "promoted": e["run_id"] in promoted}
            for e in ws.evaluations() if e["records"] == records and e.get("tag") != "promoted"]
