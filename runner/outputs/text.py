"""Render a leaderboard document as a text table, markdown, CSV or JSON."""
from __future__ import annotations

import csv
import io
import json

__all__ = ["render", "FORMATS"]

FORMATS = ("csv", "json", "markdown", "table")


def _num(value, digits: int = 4) -> str:
    if value is None:
        return "-"
    if abs(value) >= 1000:
        return f"{value:.1f}"
    return f"{value:.{digits}f}"


def _ci(ci) -> str:
    return "-" if not ci else f"[{_num(ci[0])}, {_num(ci[1])}]"


def _versus(row) -> str:
    if row.get("rank") == 1:
        return "best"
    vs = row.get("vs_best")
    if vs is None:
        return "-"
    mark = "~best" if row.get("top_group") else "worse"
    return f"{vs['diff_mean']:+.4f} p={vs['p_holm']:.2g} {mark}"


def _columns(doc: dict) -> tuple[list[str], list[list[str]]]:
    factor_names = [f["name"] for f in doc["factors"]]
    header = ["rank", *factor_names, "n", "mean", "sd", "95% CI", "test", "vs best (Holm)", "flags"]
    body = []
    for row in doc["rows"]:
        c = row["counts"]
        finished = c["done"] + c["diverged"] + c["failed"] + c["timeout"]
        n = f"{row['n']}/{finished + c['pending']}"
        body.append([str(row["rank"] or "-"), *[row["labels"][f] for f in factor_names], n,
                     _num(row["mean"]), _num(row["std"]), _ci(row["ci95"]), _num(row["test_mean"]),
                     _versus(row), ", ".join(row["flags"]) or ""])
    return header, body


def _head(doc: dict) -> list[str]:
    j = doc["jobs"]
    lines = [f"{doc['recipe']}: ranked by {doc['metric']} ({'higher' if doc['goal'] == 'max' else 'lower'}"
             f" is better); {len(doc['rows'])} configurations, {j['total']} jobs: {j['done']} done, "
             f"{j['diverged']} diverged, {j['failed']} failed, {j['timeout']} timed out, {j['pending']} pending"]
    env = doc.get("environment") or {}
    if env.get("distinct", 0) > 1:
        lines.append("Note: stored jobs ran in differing environments (" + ", ".join(env["differs_in"]) + ").")
    if env.get("recipe_versions", 0) > 1:
        lines.append(f"Note: results come from {env['recipe_versions']} versions of the recipe file; "
                     "each job's own settings are the ones shown.")
    return lines


def _table(doc: dict) -> str:
    header, body = _columns(doc)
    widths = [max(len(r[i]) for r in [header, *body]) for i in range(len(header))]
    fmt = lambda cells: "  ".join(c.rjust(w) if i == 0 else c.ljust(w)  # noqa: E731
                                  for i, (c, w) in enumerate(zip(cells, widths))).rstrip()
    lines = _head(doc) + ["", fmt(header), fmt(["-" * w for w in widths])]
    lines += [fmt(r) for r in body]
    lines += [""] + [f"* {c}" for c in doc["cautions"]]
    return "\n".join(lines) + "\n"


def _markdown(doc: dict) -> str:
    header, body = _columns(doc)
    esc = lambda s: s.replace("|", "\\|")  # noqa: E731
    lines = [f"### {doc['recipe']}", "", *_head(doc), "",
             "| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(esc(c) for c in r) + " |" for r in body]
    lines += [""] + [f"- {c}" for c in doc["cautions"]]
    return "\n".join(lines) + "\n"


def _csv(doc: dict) -> str:
    factor_names = [f["name"] for f in doc["factors"]]
    seeds = [str(s) for s in doc["seeds"]]
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(["rank", "config_id", *factor_names, "n", "mean", "std", "ci95_low", "ci95_high",
                "test_mean", "diff_vs_best", "p_holm", "top_group", "diverged", "failed", "flags",
                *[f"seed_{s}" for s in seeds]])
    for row in doc["rows"]:
        vs = row.get("vs_best") or {}
        ci = row["ci95"] or [None, None]
        w.writerow([row["rank"], row["config_id"], *[row["labels"][f] for f in factor_names], row["n"],
                    row["mean"], row["std"], ci[0], ci[1], row["test_mean"], vs.get("diff_mean"),
                    vs.get("p_holm"), row.get("top_group"), row["counts"]["diverged"],
                    row["counts"]["failed"], ";".join(row["flags"]),
                    *[row["per_seed"].get(s) for s in seeds]])
    return out.getvalue()


def render(doc: dict, fmt: str) -> str:
    if fmt == "json":
        return json.dumps(doc, indent=2, sort_keys=False) + "\n"
    return {"table": _table, "markdown": _markdown, "csv": _csv}[fmt](doc)


def _grid_text(header: list[str], body: list[list[str]], markdown: bool) -> list[str]:
    if markdown:
        esc = lambda s: s.replace("|", "\\|")  # noqa: E731
        return (["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
                + ["| " + " | ".join(esc(c) for c in r) + " |" for r in body])
    widths = [max(len(r[i]) for r in [header, *body]) for i in range(len(header))]
    fmt = lambda cells: "  ".join(c.ljust(w) for c, w in zip(cells, widths)).rstrip()  # noqa: E731
    return [fmt(header), fmt(["-" * w for w in widths])] + [fmt(r) for r in body]


def _p(value) -> str:
    return "-" if value is None else f"{value:.2g}"


def render_ablation(ab: dict, markdown: bool = False) -> str:
    """The ablation tables of a leaderboard document, as text or markdown."""
    title = (lambda t: f"#### {t}") if markdown else (lambda t: t)
    out: list[str] = []
    body = []
    for eff in ab["main_effects"]:
        for lvl in eff["levels"]:
            d = lvl["diff_vs_baseline"]
            is_base = lvl["label"] == eff["baseline"]
            body.append([eff["factor"], lvl["label"] + (" (baseline)" if is_base else ""), _num(lvl["mean"]),
                         _ci(lvl["ci95"]), "-" if d is None else f"{d['diff_mean']:+.4f}",
                         "-" if d is None else _ci(d["ci95"]), "-" if d is None else _p(d["p_value"]),
                         "-" if d is None else f"{d['n_pairs']}/{d['n_seeds']}"])
    if body:
        out += ["", title(f"Main effects on {ab['metric']}: each level averaged over the other factors; "
                          "difference to the baseline paired over matched configurations and seeds"), ""]
        out += _grid_text(["factor", "level", "mean", "95% CI", "vs baseline", "95% CI", "p",
                           "pairs/seeds"], body, markdown)
    ofat = ab.get("one_at_a_time")
    if ofat and ofat["rows"]:
        base = ", ".join(f"{k} = {v}" for k, v in ofat["baseline"].items())
        out += ["", title(f"One factor at a time from the baseline ({base}; mean {_num(ofat['baseline_mean'])})"), ""]
        out += _grid_text(["factor", "changed to", "mean", "vs baseline", "95% CI", "p", "seeds"],
                          [[r["factor"], r["label"], _num(r["mean"]),
                            "-" if r["diff_mean"] is None else f"{r['diff_mean']:+.4f}", _ci(r["ci95"]),
                            _p(r["p_value"]), str(r["n_pairs"])] for r in ofat["rows"]], markdown)
    for inter in ab["interactions"]:
        a_levels = list(next(iter(inter["means"].values())).keys()) if inter["means"] else []
        rows = [[bl, *[_num(row[a]) for a in a_levels], inter["best_a_by_b"][bl] or "-"]
                for bl, row in inter["means"].items()]
        verdict = "depends on" if inter["depends"] else "does not depend on"
        out += ["", title(f"Interaction: the best {inter['a']} {verdict} {inter['b']} (means)"), ""]
        out += _grid_text([f"{inter['b']} \\ {inter['a']}", *a_levels, "best"], rows, markdown)
    if ab["regularization"]:
        out += ["", title("Regularization: val metric, train-val gap and weight sparsity"), ""]
        out += _grid_text(["factor", "level", "n", "mean", "gap", "zero w", "near-zero w"],
                          [[r["factor"], r["label"], str(r["n"]), _num(r["mean"]), _num(r["gap"]),
                            _num(r["zero_fraction"], 3), _num(r["near_zero_fraction"], 3)]
                           for r in ab["regularization"]], markdown)
    if ab["optimization"]:
        out += ["", title("Optimization: epochs to reach 95% of each job's best val metric, final train loss, "
                          "divergences"), ""]
        out += _grid_text(["factor", "level", "n", "mean", "epochs to 95%", "final loss", "diverged"],
                          [[r["factor"], r["label"], str(r["n"]), _num(r["mean"]), _num(r["epochs_to_95pct"], 1),
                            _num(r["final_train_loss"]), str(r["diverged"])] for r in ab["optimization"]],
                          markdown)
    return "\n".join(out) + ("\n" if out else "")
