"""The promotion gate: compare a candidate dictionary with the promoted one, decide, promote.

The nightly flow trains a candidate, encodes, pools and evaluates it; then this module
decides what happens to it. The steps, as plain functions over the workspace (no Prefect:
the flow keeps the run's state, events, artifacts and logging):

1. :func:`outcome_without_comparison` — ``first`` when nothing is promoted yet,
   ``unchanged`` when the candidate *is* the promoted dictionary (same inputs give the same
   id); otherwise the two must be compared.
2. :func:`compare` — a paired bootstrap of the two evaluations on the same rows
   (:func:`compare_evaluations`), and the rule (:func:`gate_decision`): ``regression``,
   ``promoted`` or ``inconclusive``.
3. :func:`against_references` — a candidate that would be promoted (``first`` or
   ``promoted``) must also beat the raw records, and with ``GateOptions.beat_baselines``
   the best dictionary baseline (random patches or PCA), on its own evaluation
   (:func:`with_references`); if not, the outcome is ``below_raw`` or ``below_baseline``
   and nothing is promoted. The first run is checked too.
4. :func:`record_decision` — the promotion is checked, the decision appended to the
   workspace (``decisions/<id>``), and only then the pointer moved. A run killed between
   the two finds its decision when rerun and only moves the pointer.

A decision carries the run's key (:func:`nightly_run_key`: the records' and labels'
content and every option that can change it), so a rerun finds it
(:func:`recorded_decision`) and reports it instead of deciding again.

The workspace's ``check_promotion`` and ``promote`` do the checking and the moving; this
module decides when to call them. There is no Prefect task here: the nightly flow calls
these functions directly, so its task runs are the stages' (training, chunks, evaluations,
pictures) and the gate's writes happen in the flow's own process, in order.

Example
-------
>>> gate_decision({"difference": -0.004, "low": -0.02}, tolerance=0.01)
'inconclusive'
"""

from __future__ import annotations

import numpy as np

from .checks import check_tolerance
from .errors import InputError, problem
from .kernels.scoring import paired_bootstrap
from .workspace import Workspace, fingerprint_params, open_workspace

__all__ = ["OUTCOMES", "STATE_NAMES", "GATE_OUTCOMES", "DICTIONARY_BASELINES", "beats",
           "best_baseline", "required_baselines", "against_references", "describe_references",
           "with_references", "compare_evaluations",
           "gate_decision", "outcome_without_comparison", "compare", "nightly_run_key",
           "recorded_decision", "record_decision"]

#: What a nightly run can end with.
OUTCOMES = {
    "first": "no dictionary was promoted yet and the candidate's features beat the raw "
             "records; the candidate is promoted",
    "below_raw": "the candidate's features did not beat the raw records (higher score, and "
                 "an interval whose low end stays within the tolerance); not promoted",
    "below_baseline": "a simpler dictionary (random patches or PCA) did as well as the "
                      "candidate's features or better; not promoted",
    "promoted": "the candidate is not worse than the promoted one beyond the tolerance, "
                "its interval agrees, and its features beat the raw records; promoted",
    "unchanged": "the candidate is the promoted dictionary (same inputs); nothing to do",
    "inconclusive": "the candidate is within the tolerance but its interval reaches below it; "
                    "not promoted",
    "regression": "the candidate scored worse than the promoted one beyond the tolerance; "
                  "not promoted",
    "steady": "no drift beyond the threshold; no retrain, the promoted dictionary's features "
              "were brought up to date",
    "kept": "retraining was off: the promoted dictionary was kept and only records it had "
            "not encoded yet were encoded and pooled",
}
#: The name of the state a nightly run ends in, per outcome.
STATE_NAMES = {"first": "Promoted", "promoted": "Promoted", "unchanged": "Unchanged",
               "below_raw": "BelowRaw", "below_baseline": "BelowBaseline",
               "inconclusive": "Inconclusive", "regression": "Regression", "steady": "Steady",
               "kept": "Kept"}

#: The promotion gate's verdicts on a candidate compared with the promoted dictionary.
GATE_OUTCOMES = {
    "promoted": "not worse than the promoted dictionary beyond the tolerance, and the "
                "interval's lower end agrees",
    "inconclusive": "within the tolerance, but the interval reaches below it: the evidence "
                    "is too thin to replace the promoted dictionary",
    "regression": "worse than the promoted dictionary by more than the tolerance",
}

#: The dictionary baselines of the evaluation (the raw records are compared on every run).
DICTIONARY_BASELINES = ("random_patches", "pca")

#: The outcomes that move the pointer to the candidate.
_PROMOTING = ("first", "promoted")


def beats(comparison: dict[str, float], tolerance: float) -> bool:
    """Whether the features beat a reference (the raw records, a baseline dictionary).

    With ``d`` the features' score minus the reference's and ``[low, high]`` its paired
    bootstrap interval, the features beat it when ``d > 0`` (strictly better) and
    ``low >= -tolerance``: the same interval rule as :func:`gate_decision`, which must
    say ``promoted``, plus a strictly higher score (a tie does not show the features help).

    Parameters
    ----------
    comparison : dict
        One score's entry of an evaluation's ``versus`` (``difference``, ``low``).
    tolerance : float
        Margin, ≥ 0, in score units.

    Returns
    -------
    bool
    """
    return gate_decision(comparison, tolerance) == "promoted" and comparison["difference"] > 0


def best_baseline(evaluation: dict, metric: str) -> str | None:
    """The dictionary baseline (random patches, PCA) that scored highest on ``metric``.

    Parameters
    ----------
    evaluation : dict
        An evaluation's manifest (``evaluate_features``): its ``versus`` holds, per
        baseline and score, ``a`` (the features), ``b`` (the baseline) and the interval.
    metric : str
        The score compared.

    Returns
    -------
    str or None
        A key of :data:`DICTIONARY_BASELINES`, or ``None`` when the evaluation ran none.
        On a tie the earlier one in :data:`DICTIONARY_BASELINES` (the simpler) is named.
    """
    ran = [b for b in DICTIONARY_BASELINES if b in evaluation.get("versus", {})]
    if not ran:
        return None
    return max(ran, key=lambda b: (evaluation["versus"][b][metric]["b"], -ran.index(b)))


def required_baselines(beat_baselines: bool) -> tuple[str, ...]:
    """The evaluation baselines the gate reads: ``raw`` always, the dictionary baselines
    too with ``beat_baselines`` (the nightly flow adds them to the candidate's evaluation)."""
    return ("raw",) + (DICTIONARY_BASELINES if beat_baselines else ())


def against_references(evaluation: dict, *, metric: str, tolerance: float,
                       beat_baselines: bool) -> dict:
    """Do the candidate's features beat the raw records (and the best baseline)?

    Read from the candidate's own evaluation (its ``versus``: paired bootstraps of the
    features against each baseline on the same rows and folds); checked on every run,
    the first one too, before the candidate is compared with the promoted dictionary.

    Parameters
    ----------
    evaluation : dict
        The candidate's evaluation manifest; must hold ``raw`` in its ``versus`` (and
        ``random_patches`` and ``pca`` with ``beat_baselines``).
    metric : str
        The score compared.
    tolerance : float
        Margin, ≥ 0 (see :func:`beats`).
    beat_baselines : bool
        Also require the features to beat the best dictionary baseline.

    Returns
    -------
    dict
        ``outcome``: ``None`` when the features beat every required reference, else
        ``"below_raw"`` (checked first) or ``"below_baseline"``; ``raw``: the comparison
        with the raw records on ``metric``; ``baseline``: the best dictionary baseline's
        name (or ``None`` when none was evaluated); ``versus_baseline``: its comparison
        (or ``None``).
    """
    check_tolerance(tolerance)
    versus = evaluation.get("versus", {})
    missing = [b for b in required_baselines(beat_baselines) if b not in versus]
    if missing:
        raise InputError(problem(f"evaluation {evaluation.get('run_id')}",
                                 f"comparisons with {list(required_baselines(beat_baselines))}",
                                 f"none with {missing}",
                                 "Evaluate the candidate with those baselines (the nightly flow "
                                 "adds them itself)."))
    best = best_baseline(evaluation, metric)
    out = {"raw": versus["raw"][metric], "baseline": best,
           "versus_baseline": versus[best][metric] if best else None, "outcome": None}
    if not beats(out["raw"], tolerance):
        out["outcome"] = "below_raw"
    elif beat_baselines and not beats(out["versus_baseline"], tolerance):
        out["outcome"] = "below_baseline"
    return out


def with_references(outcome: str, references: dict) -> str:
    """The outcome once the comparisons with the raw records (and baselines) are counted.

    A candidate that would be promoted (``first``, or ``promoted`` against the promoted
    dictionary) is not when :func:`against_references` found it does not beat the raw
    records (``below_raw``) or the best baseline (``below_baseline``). Every other outcome
    stands: a regression against the promoted dictionary stays a regression (and raises
    its alert), whatever the raw records score.

    Parameters
    ----------
    outcome : str
        The outcome without the references (a key of :data:`OUTCOMES`).
    references : dict
        :func:`against_references`' result.

    Returns
    -------
    str
        A key of :data:`OUTCOMES`.
    """
    if outcome in _PROMOTING and references["outcome"] is not None:
        return references["outcome"]
    return outcome


def describe_references(references: dict, metric: str, tolerance: float) -> list[str]:
    """Plain-text lines of :func:`against_references`' result, for the nightly reports
    (CLI text and markdown artifact): the features against the raw records, and the best
    dictionary baseline beside them, so a simpler dictionary doing better shows at once.

    Parameters
    ----------
    references : dict
        :func:`against_references`' result.
    metric : str
    tolerance : float

    Returns
    -------
    list of str
    """
    def line(label: str, c: dict) -> str:
        return (f"{label} on {metric}: features {c['a']:.3f} vs {c['b']:.3f}, difference "
                f"{c['difference']:+.3f}, 95% interval [{c['low']:+.3f}, {c['high']:+.3f}], "
                f"tolerance {tolerance}: {'beaten' if beats(c, tolerance) else 'NOT beaten'}")

    lines = [line("against the raw records", references["raw"])]
    if references["baseline"] is not None:
        lines.append(line(f"against the best baseline dictionary ({references['baseline']})",
                          references["versus_baseline"]))
    return lines


def compare_evaluations(
    workspace: Workspace | str, run_a: str, run_b: str, *, n_boot: int = 2000, seed: int = 0,
) -> dict[str, dict[str, float]]:
    """Paired bootstrap of the features' scores of two evaluations on the same rows.

    Parameters
    ----------
    workspace : Workspace or str
    run_a, run_b : str
        Evaluation run ids; both must have scored the same rows with the same labels and
        split (same ``rows_fingerprint``: k-fold, the same test records, or the same
        newest share), e.g. two dictionaries evaluated with the same options.
    n_boot, seed
        As :func:`.scoring.paired_bootstrap`.

    Returns
    -------
    dict
        Per score: ``a``, ``b``, ``difference`` (a − b), ``low``, ``high``.
    """
    ws = open_workspace(workspace)
    info = {e["run_id"]: e for e in ws.evaluations() if e["run_id"] in (run_a, run_b)}
    for run in (run_a, run_b):
        if run not in info:
            raise InputError(problem(f"evaluations/{run}", "a complete evaluation", "none",
                                     "Pass run ids from the evaluation history."))
    if info[run_a]["rows_fingerprint"] != info[run_b]["rows_fingerprint"]:
        raise InputError(problem(f"evaluations {run_a} and {run_b}", "the same rows and labels",
                                 "different rows (other split, seed, max_rows, or data)",
                                 "Evaluate both with the same split, seed and max_rows."))
    a, b = ws.evaluation_arrays(run_a), ws.evaluation_arrays(run_b)
    classes = np.asarray(info[run_a]["classes"])
    # The labels of the rows scored: the test records' own with split test-set (evaluations
    # stored before splits existed scored their own records).
    scored_labels = info[run_a].get("scored_labels", info[run_a]["labels"])
    y = np.searchsorted(classes, ws.labels(scored_labels)[a["rows"]])
    code_of = lambda pred: np.searchsorted(classes, pred)  # noqa: E731 - two uses below
    return paired_bootstrap(y, code_of(a["pred_features"]), code_of(b["pred_features"]),
                            classes.size, n_boot=n_boot, seed=seed)


def gate_decision(comparison: dict[str, float], tolerance: float) -> str:
    """Decide promotion from a paired comparison (candidate = a, promoted = b).

    With ``d`` the candidate's score minus the promoted one's and ``[low, high]`` its
    bootstrap interval:

    * ``regression`` when ``d < -tolerance``;
    * ``promoted`` when ``d >= -tolerance`` and ``low >= -tolerance`` (a non-inferiority
      test with margin ``tolerance`` at the interval's level);
    * ``inconclusive`` otherwise.

    Parameters
    ----------
    comparison : dict
        One score's entry of :func:`compare_evaluations` (``difference``, ``low``).
    tolerance : float
        Margin, ≥ 0, in score units (0.01 = one accuracy point).

    Returns
    -------
    str
        A key of :data:`GATE_OUTCOMES`.
    """
    check_tolerance(tolerance)
    if comparison["difference"] < -tolerance:
        return "regression"
    return "promoted" if comparison["low"] >= -tolerance else "inconclusive"


def outcome_without_comparison(previous_id: str | None, candidate_id: str) -> str | None:
    """The outcome when no comparison is needed to decide it, else ``None``.

    Parameters
    ----------
    previous_id : str or None
        The dictionary promoted when the run started (``None``: none yet).
    candidate_id : str
        The candidate the run trained (or found trained: its id follows its inputs).

    Returns
    -------
    str or None
        ``"first"`` when nothing was promoted, ``"unchanged"`` when the candidate is the
        promoted dictionary, ``None`` when the two must be compared (:func:`compare`).
    """
    if previous_id is None:
        return "first"
    if previous_id == candidate_id:
        return "unchanged"
    return None


def compare(workspace: Workspace | str, candidate_run: str, promoted_run: str, *, metric: str,
            tolerance: float, n_boot: int = 2000, seed: int = 0) -> dict:
    """Compare the candidate's evaluation with the promoted dictionary's, and decide.

    Parameters
    ----------
    workspace : Workspace or str
    candidate_run, promoted_run : str
        Run ids of the two evaluations, made on the same rows (same seed and ``max_rows``).
    metric : str
        The score the gate compares (``accuracy``, ``balanced_accuracy`` or ``macro_f1``).
    tolerance : float
        Margin, ≥ 0 (see :func:`gate_decision`).
    n_boot, seed
        As :func:`.scoring.paired_bootstrap`.

    Returns
    -------
    dict
        ``outcome`` (a key of :data:`GATE_OUTCOMES`) and ``gate``: the comparison of
        ``metric`` (``a`` the candidate's score, ``b`` the promoted one's, ``difference``,
        ``low``, ``high``).
    """
    comparison = compare_evaluations(workspace, candidate_run, promoted_run, n_boot=n_boot, seed=seed)
    return {"outcome": gate_decision(comparison[metric], tolerance), "gate": comparison[metric]}


def nightly_run_key(ws: Workspace, records: str, options: dict) -> str:
    """What a nightly run decides on, as a digest: the records' and labels' content (and
    the test records' with split ``test-set``) and every option that can change the
    decision (not workers, leases, pictures or alerts).

    The promoted dictionary is not part of it: a run killed after moving the pointer must
    find its own decision when rerun (see :func:`recorded_decision`).
    """
    labels = options.get("labels") or records
    identity = {
        "records": records, "records_fingerprint": ws.records_fingerprint(records),
        "labels_fingerprint": ws.labels_fingerprint(labels) if ws.has_labels(labels) else None,
        "options": options}
    evaluate = options.get("evaluate") or {}
    if evaluate.get("split") == "test-set":
        # The test records decide too; only then is the entry there, so the keys of runs
        # without a test set stay what they were.
        test = evaluate["test_records"]
        identity["test_fingerprints"] = {
            "records": ws.records_fingerprint(test),
            "labels": ws.labels_fingerprint(test) if ws.has_labels(test) else None}
    return fingerprint_params(identity)


def recorded_decision(ws: Workspace, run_key: str) -> dict | None:
    """The decision recorded for ``run_key`` if it still describes the workspace.

    It does while the pointer is where that run found it or where it put it; a pointer
    moved since by someone else makes it stale, and the run decides afresh.
    """
    recorded = ws.find_decision(run_key)
    if recorded is None or ws.promoted not in (recorded["previous_id"], recorded["promoted_id"]):
        return None
    return recorded


def record_decision(workspace: Workspace | str, records: str, report: dict, *, run_key: str,
                    recorded: dict | None) -> dict:
    """Record the nightly run's decision and move the pointer when it promotes.

    The promotion is checked first (``Workspace.check_promotion``: the candidate, its
    features and its evaluation complete and consistent), then the decision is appended
    (``complete`` last), then the pointer moves: a run killed between them finds its
    decision when rerun and only moves the pointer. A recorded decision is reported as it
    was, never decided or appended again.

    Parameters
    ----------
    workspace : Workspace or str
    records : str
        Name of the records the run worked on.
    report : dict
        The nightly run's report so far; read: ``outcome``, ``candidate_id``,
        ``previous_id``, ``metric``, ``tolerance``, ``gate``, ``drift``, ``references``
        (:func:`against_references`, when the candidate was evaluated), and the
        ``candidate`` and ``promoted`` evaluations' manifests (or ``None``).
    run_key : str
        :func:`nightly_run_key` of the run.
    recorded : dict or None
        :func:`recorded_decision` of the run: the decision these inputs had already.

    Returns
    -------
    dict
        ``outcome`` (the recorded one, when there was one), ``decision_id``,
        ``already_decided`` (only when ``recorded``: its id), and ``promoted_id``, the
        dictionary promoted after the call.
    """
    ws = open_workspace(workspace)
    cand = report["candidate"]
    out: dict = {"outcome": recorded["outcome"] if recorded else report["outcome"]}
    if recorded:
        out["decision_id"] = out["already_decided"] = recorded["decision_id"]
    promoting = out["outcome"] in _PROMOTING
    if promoting:
        # The dictionary, its features and this evaluation of them must be complete and
        # consistent; checked before anything is recorded.
        ws.check_promotion(report["candidate_id"], evaluation=cand["run_id"])
    if not recorded:
        out["decision_id"] = ws.append_decision({
            "records": records, "outcome": out["outcome"], "candidate_id": report["candidate_id"],
            "previous_id": report["previous_id"],
            "promoted_id": report["candidate_id"] if promoting else report["previous_id"],
            "promoted": promoting, "metric": report["metric"],
            "tolerance": report["tolerance"], "gate": report["gate"], "drift": report["drift"],
            "references": report.get("references"),
            "candidate_run": cand["run_id"] if cand else None,
            "promoted_run": report["promoted"]["run_id"] if report["promoted"] else None,
            "run_key": run_key,
        })
    if promoting and ws.promoted != report["candidate_id"]:
        ws.promote(report["candidate_id"], evaluation=cand["run_id"])
    out["promoted_id"] = ws.promoted
    return out
