"""The text reports of the ``atomline`` commands (``--json`` prints the result itself instead)."""

from __future__ import annotations


def _describe_records(r: dict) -> str:
    return (f"data/{r['name']}: {r['shape'][0]} records of shape {tuple(r['shape'][1:])}, {r['dtype']}, "
            f"{r['n_chunks']} chunks of {r['chunk_rows']} rows, fingerprint {r['fingerprint']}"
            + (f", {r['kind']}" if r.get("kind") else ""))


def _describe_stage(r: dict) -> str:
    done = r.get("encoded", r.get("pooled"))
    rate = r.get("records_per_second")
    return (f"{r['output']}: {done} chunks written, {r['skipped']} already done (skipped), "
            f"{r['records']} records" + (f", {rate:,.0f} records/s" if rate else ""))


def _describe_evaluation(r: dict) -> str:
    from atomline.flows.artifacts import baseline_summary, score_table

    lines = [f"evaluation {r['run_id']} of dictionary {r['dict_id']} "
             f"({r['n_rows']} labelled rows, {r['folds']}-fold cross-validation)"]
    columns = [("set", "feature set", ""), ("accuracy", "accuracy", ".3f"),
               ("balanced_accuracy", "balanced", ".3f"), ("macro_f1", "macro-F1", ".3f"),
               ("features_minus_set", "features - set", "+.3f"), ("interval_95", "95% interval", "")]
    lines += ["  " + line for line in _table(score_table(r), columns).splitlines()]
    if baseline_summary(r):
        lines.append("  " + baseline_summary(r))
    if r.get("pictures"):
        lines.append(f"  pictures: {', '.join(r['pictures'])}")
    return "\n".join(lines)


def _describe_nightly(r: dict) -> str:
    from atomline.flows import OUTCOMES
    from atomline.stages.gate import describe_references

    state = r.get("state", {})
    lines = [f"nightly outcome: {r['outcome'].upper()} — {OUTCOMES[r['outcome']]}"
             + (f"  [Prefect state {state['type']} '{state['name']}']" if state else ""),
             f"candidate dictionary {r['candidate_id']} (previously promoted: {r['previous_id']})",
             "  " + _describe_stage(r["encode"]), "  " + _describe_stage(r["pool"])]
    if r.get("drift"):
        d = r["drift"]
        lines.append(f"  drift: reconstruction error {100 * d['error_change']:+.1f}%, nonzeros "
                     f"{100 * d['nonzeros_change']:+.1f}% (threshold {100 * d['threshold']:.0f}%)")
    if r.get("candidate"):
        lines.append(_describe_evaluation(r["candidate"]))
    if r.get("references"):
        lines += ["  " + line for line in describe_references(r["references"], r["metric"],
                                                              r["tolerance"])]
    if r.get("gate"):
        g = r["gate"]
        lines.append(f"  gate on {r['metric']}: candidate {g['a']:.3f} vs promoted {g['b']:.3f}, "
                     f"difference {g['difference']:+.3f}, 95% interval [{g['low']:+.3f}, {g['high']:+.3f}], "
                     f"tolerance {r['tolerance']}")
    lines.append(f"promoted dictionary now: {r['promoted_id']}")
    if r.get("already_decided"):
        lines.append(f"these inputs were decided already ({r['already_decided']}): "
                     "that decision is reported, nothing was evaluated or decided again")
    from atomline.flows.artifacts import SCREENING, settings_lines

    lines += settings_lines(r)
    lines.append(SCREENING)
    return "\n".join(lines)


def _describe_demo(r: dict) -> str:
    from atomline.stages.gate import best_baseline
    from atomline.flows.artifacts import SCREENING

    d, cand, enc = r["dictionary"], r["candidate"], r["encode"]
    patches = enc["records"] * _patches_per_record(d["geometry"])
    rate = enc.get("records_per_second")
    best = best_baseline(cand, "accuracy")
    versus = cand["versus"][best]["accuracy"]
    return "\n".join([
        "atomline demo — synthetic vibration records (invented data; see the README)",
        f"  dictionary   {r['candidate_id']}: {d['n_atoms']} atoms of {d['n_features']} samples, "
        f"learner {d['method']}, coder {d['coder']} {d['coder_options']}, coherence {d['coherence']:.3f}",
        f"  encoded      {enc['records']} records ({patches:,} patches) in {enc['seconds']:.1f} s"
        + (f" — {rate:,.0f} records/s" if rate else "") + f"; {enc['skipped']} chunks already done",
        f"  classes      {', '.join(r['classes'])}",
        f"  accuracy     sparse features {cand['features']['accuracy']:.3f} against the best "
        f"baseline dictionary ({best}) {cand[best]['accuracy']:.3f}: "
        f"{100 * versus['difference']:+.1f} points, 95% interval [{100 * versus['low']:+.1f}, "
        f"{100 * versus['high']:+.1f}] ({cand['n_rows']} records, {cand['folds']}-fold)",
        f"               raw samples {cand['raw']['accuracy']:.3f}",
        f"  outcome      {r['outcome']}; promoted dictionary: {r['promoted_id']}",
        f"  outputs      {r['workspace']}  (atomline show {r['workspace']})",
        f"  total time   {r['seconds']:.1f} s",
        "  This is a screening aid for data work, not a maintenance or safety decision: the "
        "scores say how well\n  features separate invented classes, not whether any machine "
        "needs attention.",
    ])


def _patches_per_record(geometry: dict) -> int:
    n = 1
    for extent, size, stride in zip(geometry["record_shape"], geometry["size"], geometry["stride"]):
        n *= (extent - size) // stride + 1
    return n


def _describe_show(r: dict) -> str:
    lines = [f"workspace {r['url']} (layout {r['layout']}); promoted dictionary: {r['promoted']}"]
    for name, info in r["records"].items():
        lines.append(f"  data/{name}: {info['shape']} {info['dtype']}, {info['n_chunks']} chunks"
                     + (", labelled" if info["labelled"] else ""))
    for dict_id, info in r["dictionaries"].items():
        lines.append(f"  dictionaries/{dict_id}: {info['n_atoms']} atoms, {info['method']}, {info['created']}")
    for path, info in r["outputs"].items():
        lines.append(f"  {path}: {info['chunks_done']}/{info['n_chunks']} chunks done")
    lines.append(f"  evaluations: {r['evaluations']}, gate decisions: {r.get('decisions', 0)}")
    latest = r.get("latest_evaluation")
    if latest:
        scores = ", ".join(f"{k} {v:.3f}" for k, v in latest["metrics"].items() if v is not None)
        lines.append(f"  latest evaluation {latest['run_id']} of {latest['dict_id']}: accuracy {scores}")
    pictures = r.get("pictures", [])
    if pictures:
        lines.append(f"  pictures ({len(pictures)}; export with atomline plots {r['url']} --export DIR):")
        lines += [f"    {p['path']}  {p.get('title', '')}" for p in pictures]
    return "\n".join(lines)


def _table(rows: list[dict], columns: list[tuple[str, str, str]]) -> str:
    """Fixed-width text table; columns are (key, heading, format)."""
    cells = [[h for _, h, _ in columns]]
    for row in rows:
        cells.append(["-" if row.get(k) is None else format(row[k], f) for k, _, f in columns])
    widths = [max(len(c[i]) for c in cells) for i in range(len(columns))]
    text = ["  ".join(c.ljust(w) for c, w in zip(line, widths)).rstrip() for line in cells]
    text.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(text)


def _describe_history(r: dict) -> str:
    if not r["evaluations"]:
        return f"no evaluations in {r['workspace']} yet"
    columns = [("created", "created", ""), ("records", "records", ""), ("tag", "tag", ""),
               ("dict_id", "dictionary", ""), ("coder", "coder", ""), ("n_rows", "rows", "d"),
               ("accuracy", "accuracy", ".3f"), ("macro_f1", "macro-F1", ".3f"),
               ("raw_accuracy", "raw", ".3f"), ("baseline_accuracy", "best baseline", ".3f"),
               ("baseline", "baseline dictionary", ""), ("outcome", "gate", "")]
    return _table(r["evaluations"], columns) + f"\npromoted dictionary: {r['promoted']}"


def _describe_plots(r: dict) -> str:
    if not r["pictures"]:
        return f"no pictures in {r['workspace']} yet (the evaluate and nightly flows render them)"
    lines = [f"{p['path']}  {p.get('title', '')}  {p['bytes']:,} bytes"
             + (f"  -> {p['file']}" if "file" in p else "") for p in r["pictures"]]
    return "\n".join(lines)


def _describe_serve(r: dict) -> str:
    when = ", ".join(f"{s['cron']} ({s['timezone']})" for s in r["schedules"])
    verb = "serving" if r["served"] else "would serve (dry run)"
    return (f"{verb} deployment {r['deployment']} of flow {r['flow']} on schedule {when}; "
            f"workspace {r['parameters']['workspace']}, records {r['parameters']['records']}")


def _describe_search(r: dict) -> str:
    from atomline.stages.search import table_text

    lines = [f"search {r['search_id']}: " + ", ".join(
        f"{s['candidates']} × {s['rows']} rows" for s in r["schedule"]), table_text(r["ranked"]),
        f"picture: {r['picture']}"]
    if r.get("recipe_id"):
        lines.append(f"winner stored as recipe {r['recipe_id']}")
    return "\n".join(lines)
