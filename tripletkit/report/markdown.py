"""The Markdown of the two reports: ``report.md`` of a score and ``sweep.md`` of a margin sweep.

Both read the dicts that :func:`tripletkit.evaluate.score` and :func:`tripletkit.sweeps.sweep`
return (missing parts are said to be missing) and spell every number through
:mod:`tripletkit.report.format`. Each section of the score report is one function, in the order
of the report. :data:`CAUTION` closes both.
"""

from __future__ import annotations

from .format import (bracketed, compact, duration, fmr_target, interval, level, metric_label, number, percent,
                     significant, sorted_targets, table, verification_part, with_interval)

__all__ = ["CAUTION", "render_markdown", "render_sweep_markdown"]

#: The caution carried by every report (the README's "Caution on verification thresholds" says the same).
CAUTION = (
    "Verification error rates (FMR, FNMR, EER) and the thresholds that reach them hold only for the "
    "population and the capture conditions of the evaluation set they were measured on. Check the "
    "error rates of every subgroup you serve (the `group` column reports them) before relying on a "
    "threshold. When the model identifies people, deployment decisions follow local law and review "
    "— an impact assessment, a lawful basis, human review of matches — and not this tool."
)


# ---------------------------------------------------------------------------------------------
# the score report
# ---------------------------------------------------------------------------------------------
def render_markdown(report, *, plots_requested=True):
    """The report for people: headline numbers, FNMR at each FMR, subgroups, retrieval, clustering,
    embedding health, plots and the caution.

    Parameters
    ----------
    report : dict
        A report dict of :func:`tripletkit.evaluate.score` (missing parts are shown as such).
    plots_requested : bool, default True
        Only changes the wording when ``report["plots"]`` is empty.

    Returns
    -------
    str
        Markdown text ending with a newline.
    """
    ver = verification_part(report)
    out = _introduction(report, ver)
    out += _headline(report, ver)
    out += _fnmr_at_fmr(report, ver)
    out += _subgroups(ver)
    out += _retrieval(report.get("retrieval") or {})
    out += _clustering(report.get("clustering"))
    out += _health(report.get("health") or {}, report.get("input") or {})
    out += _plots(report, ver, plots_requested)
    out += ["", "## Caution", "", report.get("caution") or CAUTION, ""]
    return "\n".join(out)


def _introduction(report, ver):
    inp = report.get("input") or {}
    out = ["# Evaluation report", ""]
    src = inp.get("path") or "(in-memory table)"
    out.append(
        f"Table `{src}`: {number(inp.get('rows'))} rows, {number(inp.get('identities'))} identities, "
        f"dimension {number(inp.get('dim'))}; fingerprint `{inp.get('fingerprint')}`."
    )
    if inp.get("dropped_rows"):
        out.append(f"{number(inp['dropped_rows'])} invalid rows (NaN/Inf or zero norm) were dropped before scoring.")
    mode = f"the pair list `{inp['pair_list']}`" if inp.get("pair_list") else "every pair of distinct rows"
    out.append(
        f"Verification pairs: {mode}; {number(ver.get('genuine_pairs'))} genuine (same identity) and "
        f"{number(ver.get('impostor_pairs'))} impostor pairs. Scores are cosine similarities of the "
        "unit-length embeddings; a pair is accepted when its score is at or above the threshold."
    )
    out.append(f"tripletkit {report.get('tripletkit_version', '?')}, {duration(report.get('seconds'))}.")
    warns = report.get("warnings") or []
    if warns:
        out += ["", "**Warnings**", ""] + [f"- {w}" for w in warns]
    return out


def _headline(report, ver):
    ret = report.get("retrieval") or {}
    ops = ver.get("fnmr_at_fmr") or {}
    if ver.get("eer") is not None:
        eer = f"{percent(ver.get('eer'))} at threshold {number(ver.get('eer_threshold'))}"
    else:
        eer = f"n/a ({ver.get('reason', 'not computed')})"
    bound = "" if ver.get("auc_exact") in (None, True) else f" (within {significant(ver.get('auc_error_bound'), 2)})"
    rows = [["EER", eer], ["AUC", number(ver.get("auc")) + bound]]
    for key in sorted_targets(ops):
        entry = ops[key] or {}
        value = "not resolvable" if entry.get("fnmr") is None else with_interval(entry["fnmr"], entry.get("ci"))
        rows.append([f"FNMR at FMR {fmr_target(key)}", value])
    recall = ret.get("recall_at_k") or {}
    for k in sorted(recall, key=int)[:1]:
        rows.append([f"Recall@{k}", percent(recall[k])])
    if "map_at_r" in ret:
        rows.append(["MAP@R", number(ret.get("map_at_r"))])
    return ["", "## Headline", ""] + table(["metric", "value"], rows)


def _fnmr_at_fmr(report, ver):
    ops = ver.get("fnmr_at_fmr") or {}
    confidence = (ver.get("bootstrap") or {}).get("confidence", (report.get("config") or {}).get("confidence"))
    ci_head = f"{level(confidence)} interval" if isinstance(confidence, (int, float)) else "interval"
    out = ["", "## FNMR at each FMR target", ""]
    out.append(
        "FNMR at a target is the lowest FNMR over thresholds whose FMR is at most the target "
        "(terms of ISO/IEC 19795-1). Intervals resample identities, not pairs (subject-level "
        "bootstrap), because pairs that share an identity are not independent."
    )
    out.append("")
    rows = []
    for key in sorted_targets(ops):
        entry = ops[key] or {}
        rows.append([fmr_target(key), percent(entry.get("fnmr")), interval(entry.get("ci")),
                     number(entry.get("threshold")), entry.get("reason") or ""])
    if not rows:
        return out + ["(none)"]
    return out + table(["FMR target", "FNMR", ci_head, "threshold (cosine)", "note"], rows)


def _subgroups(ver):
    groups = ver.get("groups")
    if not groups:
        return []
    keys = sorted_targets(ver.get("fnmr_at_fmr") or {})
    out = ["", "## Subgroups", ""]
    out.append(
        "FMR and FNMR of the pairs whose two rows are both in the group, at the global threshold "
        "of each FMR target (differential error rates). A group whose FMR is well above the "
        "target gets more false matches than the global figure suggests."
    )
    out.append("")
    header = ["group", "genuine pairs", "impostor pairs"]
    for key in keys:
        header += [f"FMR at {compact(key)}", f"FNMR at {compact(key)}"]
    rows = []
    for name in sorted(groups):
        group = groups[name] or {}
        row = [name, number(group.get("genuine_pairs")), number(group.get("impostor_pairs"))]
        for key in keys:
            at = (group.get("at_fmr") or {}).get(key) or {}
            row += [percent(at.get("fmr"), 3), percent(at.get("fnmr"))]
        rows.append(row)
    return out + table(header, rows)


def _retrieval(ret):
    out = ["", "## Retrieval", ""]
    recall = ret.get("recall_at_k") or {}
    if ret.get("reason") and not recall:
        return out + [f"Not computed: {ret['reason']}."]
    out.append("Each row queries all other rows (it is left out of its own gallery), nearest first.")
    out.append("")
    rows = [[f"Recall@{k}", percent(recall[k])] for k in sorted(recall, key=int)]
    rows += [["R-precision", number(ret.get("r_precision"))], ["MAP@R", number(ret.get("map_at_r"))]]
    out += table(["metric", "value"], rows)
    if ret.get("queries") is not None:
        out += ["", f"Queries: {number(ret.get('queries'))} rows with at least one other row of their identity."]
    return out


def _clustering(clu):
    out = ["", "## Clustering", ""]
    if clu is None:
        return out + ["Not run (clustering = false)."]
    if clu.get("purity") is None:
        return out + [f"Not computed: {clu.get('reason', 'no reason given')}."]
    out.append(f"k-means with k = {number(clu.get('clusters'))} (the number of identities), scored against the labels.")
    out.append("")
    return out + table(["metric", "value"], [["purity", number(clu.get("purity"))], ["NMI", number(clu.get("nmi"))],
                                             ["ARI", number(clu.get("ari"))]])


def _health(hea, inp):
    out = ["", "## Embedding health", ""]
    out += table(["measure", "value"], [
        ["mean impostor cosine", number(hea.get("mean_impostor_cosine"))],
        ["effective dimension", number(hea.get("effective_dimension"), 2) + f" of {number(inp.get('dim'))}"],
        ["collapsed", number(hea.get("collapsed")) if hea.get("collapsed") is not None else "n/a"],
    ])
    if hea.get("collapsed"):
        out += ["", "**The embeddings look collapsed**" + (f": {hea['rule']}" if hea.get("rule") else "")
                + ". Error rates of a collapsed model say little; check the training run first."]
    elif hea.get("rule"):
        out += ["", f"Collapse rule: {hea['rule']}."]
    return out


def _plots(report, ver, plots_requested):
    out = ["", "## Plots", ""]
    plots = report.get("plots") or []
    if plots:
        for plot in plots:
            out += [f"![{plot['title']}]({plot['file']})", ""]
        out.pop()
    elif not plots_requested:
        out.append("Not drawn (plots = false).")
    else:
        out.append(f"Not drawn: {ver.get('reason') or 'no verification curves'}.")
    return out


# ---------------------------------------------------------------------------------------------
# the sweep report
# ---------------------------------------------------------------------------------------------
def render_sweep_markdown(result, *, mined_regimes=()):
    """The margin sweep for people: the verdict, the paired difference, one row per run, the plots.

    Parameters
    ----------
    result : dict
        The result of :func:`tripletkit.sweeps.sweep` (the content of ``sweep.json``).
    mined_regimes : sequence of str, default ()
        The regimes that each epoch of a fit-head sweep mined (named in the loss-curve note).

    Returns
    -------
    str
        Markdown text ending with a newline.
    """
    rows = result["runs"]
    comp = result["comparison"]
    held = result["heldout"]
    label = metric_label(result["primary"])
    lines = [
        "# Margin sweep",
        "",
        f"Mode `{result['mode']}`, {number(len(rows))} margins, ranked by **{label}** (lower is better). "
        f"Held-out set: {number(held['rows'])} rows, {number(held['identities'])} identities, "
        f"{number(held['genuine_pairs'])} genuine and {number(held['impostor_pairs'])} impostor pairs.",
        "",
        "## Verdict",
        "",
        comp["verdict"][0].upper() + comp["verdict"][1:] + ".",
        "",
    ]
    if comp["difference"] is not None:
        span = f"{level(comp['confidence'])} interval {bracketed(comp['ci'])}" if comp["ci"] else "no interval"
        lines += [
            f"Paired difference (runner-up minus best) {significant(comp['difference'])}, {span}",
            f"from {number(comp['replicates_used'])} resamples of the held-out identities (seed {comp['seed']}); "
            "each resample is applied to both runs, so only the difference between the runs varies.",
            "",
        ]
    lines += ["## Runs", ""] + _runs_table(result, label)
    lines += [
        "",
        "Intervals in the FNMR@ columns come from each run's own evaluation report; the interval of the "
        "ranking metric comes from the sweep's shared identity resamples. 'active' and the regime "
        "counts are the miner's statistics: "
        + ("triplets on the fitted head's training outputs at each margin." if result["mode"] == "fit-head"
           else "triplets on each run's training dump (n/a where none was given)."),
        "",
        "## Plots",
        "",
    ]
    for plot in result["plots"]:
        lines += [f"![{plot['title']}]({plot['file']})", ""]
    if result["mode"] == "fit-head":
        lines += [
            "Loss curves: the mean hinge loss of the triplets mined at the start of each epoch (solid) and of "
            "the same triplets after the epoch's updates (dashed). Each epoch mines only the regimes asked for "
            f"({', '.join(mined_regimes)}) on the current head, so the loss measures how hard the remaining "
            "violations are rather than how many there are; the number of mined triplets (right) is the count.",
            "",
        ]
    if result["notes"]:
        lines += ["## Notes", ""] + [f"- {note}" for note in result["notes"]] + [""]
    lines += ["## Caution", "", result.get("caution") or CAUTION, ""]
    return "\n".join(lines)


def _runs_table(result, label):
    """One row per margin: the ranking metric with its interval, the reports' headline, mining counts."""
    rows = result["runs"]
    fmr_keys = list(rows[0]["metrics"]["fnmr_at_fmr"]) if rows else []
    ci = f"{level(result['comparison']['confidence'])} CI"
    ranked_by_eer = result["primary"] == "eer"
    header = ["margin", *([] if ranked_by_eer else [f"{label} ({ci})"]),
              f"EER ({ci})" if ranked_by_eer else "EER",
              *[f"FNMR@{key}" for key in fmr_keys], "AUC", "Recall@1", "MAP@R", "purity", "NMI", "active",
              "hard / semi-hard / easy"]
    body = []
    for row in rows:
        metrics, mining, primary = row["metrics"], row["mining"], row["primary"]
        cells = [f"[{compact(row['margin'])}]({row['report']})"]
        if not ranked_by_eer:
            cells.append(with_interval(primary["value"], primary["ci"]))
        cells.append(with_interval(metrics["eer"], primary["ci"] if ranked_by_eer else None))
        for key in fmr_keys:
            entry = metrics["fnmr_at_fmr"].get(key) or {}
            cells.append(with_interval(entry.get("fnmr"), entry.get("ci")))
        cells += [number(metrics["auc"]), percent(metrics["recall_at_1"]), number(metrics["map_at_r"]),
                  number(metrics["purity"]), number(metrics["nmi"])]
        if mining:
            regimes = mining["regimes"]
            cells += [number(mining["active_fraction"], 3),
                      " / ".join(number(regimes[name]) for name in ("hard", "semi-hard", "easy"))]
        else:
            cells += ["n/a", "n/a"]
        body.append(cells)
    return table(header, body)
