"""What a flow run shows in the Prefect UI: artifacts built from evaluations and pictures.

* a **markdown** summary per evaluation (or nightly run): outcome, scores of every
  feature set, the differences against each baseline with their bootstrap intervals,
  the learning curve, and the pictures (inline PNGs plus their workspace paths);
* a **table** of the scores (one row per feature set);
* a **progress** artifact updated while a long encode runs (:class:`ChunkProgress`).

Keys are ``atomline-<records>-summary`` / ``-scores`` / ``-encode-progress``, so the UI
groups the artifacts of successive runs over the same records; every call creates a new
version under the key.
"""

from __future__ import annotations

import base64
import re

from prefect.artifacts import (
    create_markdown_artifact,
    create_progress_artifact,
    create_table_artifact,
    update_progress_artifact,
)

from atomline.stages.gate import best_baseline
from atomline.stages.kernels.scoring import SCORES
from atomline.stages.workspace import Workspace

__all__ = ["artifact_key", "score_table", "baseline_summary", "summary_markdown", "publish_evaluation",
           "ChunkProgress", "settings_lines", "SCREENING"]

#: Pictures larger than this in total are listed by path only, not embedded.
_EMBED_LIMIT = 1_500_000


#: Said wherever a result could lead someone to act on machinery.
SCREENING = "This is a screening aid for data work, not a maintenance or safety decision."


def settings_lines(report: dict) -> list[str]:
    """The values chosen from the records' shape or given, with their reasons, of a nightly
    report (train and pool manifests); none when it trained nothing."""
    train, pooled = report.get("train") or {}, report.get("pool") or {}
    reasons = dict((train.get("settings") or {}).get("reasons") or {})
    if pooled.get("regions_reason"):
        reasons["regions"] = pooled["regions_reason"]
    if not reasons:
        return []
    return ["settings (chosen from the records' shape unless given):"] + [
        f"  {name}: {reason}" for name, reason in reasons.items()]


def artifact_key(records: str, what: str) -> str:
    """A Prefect artifact key (lowercase letters, digits, dashes) for ``records``."""
    slug = re.sub(r"[^a-z0-9]+", "-", records.lower()).strip("-") or "records"
    return f"atomline-{slug}-{what}"


def score_table(evaluation: dict) -> list[dict]:
    """One row per feature set: scores and the difference features − set with its interval.

    Parameters
    ----------
    evaluation : dict
        A manifest of ``evaluate_features``.

    Returns
    -------
    list of dict
        Plain rows for ``create_table_artifact`` and the terminal.
    """
    rows = []
    for name in ("features", "raw", "random_patches", "pca"):
        if name not in evaluation:
            continue
        row = {"set": name, **{s: round(evaluation[name][s], 4) for s in SCORES}}
        versus = evaluation.get("versus", {}).get(name, {}).get("accuracy")
        row["features_minus_set"] = None if versus is None else round(versus["difference"], 4)
        row["interval_95"] = None if versus is None else f"[{versus['low']:+.3f}, {versus['high']:+.3f}]"
        rows.append(row)
    return rows


def baseline_summary(evaluation: dict) -> str | None:
    """One line naming the best baseline dictionary (random patches or PCA) beside the raw
    records and the sparse features, flagged when the simpler dictionary does as well or
    better; ``None`` when the evaluation ran no dictionary baseline.

    Parameters
    ----------
    evaluation : dict
        A manifest of ``evaluate_features``.
    """
    best = best_baseline(evaluation, "accuracy")
    if best is None:
        return None
    raw = f" beside raw records {evaluation['raw']['accuracy']:.3f}" if "raw" in evaluation else ""
    features, simpler = evaluation["features"]["accuracy"], evaluation[best]["accuracy"]
    return (f"Best baseline dictionary: {best} {simpler:.3f}{raw}; sparse features "
            f"{features:.3f}" + (" — a simpler dictionary does as well or better"
                                 if simpler >= features else ""))


def summary_markdown(evaluation: dict, *, title: str, lines: list[str] | None = None,
                     pictures: dict[str, bytes] | None = None, workspace_url: str = "") -> str:
    """The markdown summary of one evaluation.

    Parameters
    ----------
    evaluation : dict
        A manifest of ``evaluate_features``.
    title : str
    lines : list of str, optional
        Extra lines under the title (e.g. the nightly outcome).
    pictures : dict of str to bytes, optional
        Workspace path → PNG bytes, embedded inline when small enough.
    workspace_url : str

    Returns
    -------
    str
    """
    md = [f"# {title}", ""]
    md += lines or []
    md += ["", f"Dictionary `{evaluation['dict_id']}`, coder `{evaluation['coder']}`, pooling "
           f"`{evaluation['pooling']}`; {evaluation['n_rows']} labelled rows, "
           f"{evaluation['folds']}-fold stratified cross-validation (out-of-fold scores).", ""]
    simpler = baseline_summary(evaluation)
    if simpler:
        md += [simpler + ".", ""]
    md += ["| set | accuracy | balanced accuracy | macro-F1 | features − set (accuracy) | 95% interval |",
           "|---|---|---|---|---|---|"]
    for r in score_table(evaluation):
        diff = "" if r["features_minus_set"] is None else f"{r['features_minus_set']:+.3f}"
        md.append(f"| {r['set']} | {r['accuracy']:.3f} | {r['balanced_accuracy']:.3f} | "
                  f"{r['macro_f1']:.3f} | {diff} | {r['interval_95'] or ''} |")
    curve = evaluation.get("learning_curve") or {}
    if curve:
        shown = [k for k in ("features", "raw", best_baseline(evaluation, "accuracy")) if k in curve]
        md += ["", "Learning curve (accuracy against labelled training rows):", "",
               "| rows | " + " | ".join(shown) + " |", "|---|" + "---|" * len(shown)]
        for i, n in enumerate(curve["train_rows"]):
            md.append(f"| {n:.0f} | " + " | ".join(f"{curve[k][i]:.3f}" for k in shown) + " |")
    if pictures:
        md += ["", "## Pictures", ""]
        embed = sum(len(b) for b in pictures.values()) <= _EMBED_LIMIT
        for path, png in pictures.items():
            md.append(f"- `{path}` in `{workspace_url}` (export: `atomline plots {workspace_url} --export DIR`)")
            if embed:
                md.append(f"\n  ![{path}](data:image/png;base64,{base64.b64encode(png).decode()})\n")
    return "\n".join(md)


def publish_evaluation(ws: Workspace, evaluation: dict, records: str, *, title: str,
                       lines: list[str] | None = None, picture_paths: list[str] | None = None) -> dict:
    """Create the markdown and table artifacts of one evaluation in the current run.

    Returns
    -------
    dict
        ``{"summary": artifact id, "scores": artifact id}`` as strings.
    """
    pictures = {p: ws.picture(p) for p in picture_paths or []}
    summary = create_markdown_artifact(
        summary_markdown(evaluation, title=title, lines=lines, pictures=pictures, workspace_url=ws.url),
        key=artifact_key(records, "summary"), description=title)
    table = create_table_artifact(score_table(evaluation), key=artifact_key(records, "scores"),
                                  description=f"scores of evaluation {evaluation['run_id']}")
    return {"summary": str(summary), "scores": str(table)}


class ChunkProgress:
    """A Prefect progress artifact (0–100 %) that follows chunks as batches finish.

    Parameters
    ----------
    records : str
        Names the artifact key.
    total : int
        Chunks to do in this run.
    label : str
        Shown as the description.
    """

    def __init__(self, records: str, total: int, label: str):
        self.total, self.done, self.label = max(total, 0), 0, label
        self.id = create_progress_artifact(100.0 if self.total == 0 else 0.0,
                                           key=artifact_key(records, f"{label}-progress"),
                                           description=f"{label}: 0 of {self.total} chunks")

    def advance(self, chunks: int) -> float:
        """Count ``chunks`` more as finished; returns the percentage now shown."""
        self.done = min(self.total, self.done + chunks)
        percent = 100.0 * self.done / self.total if self.total else 100.0
        update_progress_artifact(self.id, percent,
                                 description=f"{self.label}: {self.done} of {self.total} chunks")
        return percent
