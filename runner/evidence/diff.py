"""Compare two leaderboards: configurations matched by their level labels, each change
judged with Welch's unpaired interval (the runs are separate, so seeds do not pair).

Inputs may be leaderboard JSON files (``recipe board --format json``), result stores, or
recipes (read through their default store).
"""
from __future__ import annotations

import json
from pathlib import Path

from runner.evidence import stats
from runner.errors import StoreError, UserError
from runner.recipe.grid import canonical
from runner.outputs.text import _grid_text, _num, _ci, _p

__all__ = ["load_board", "diff", "render_diff", "FORMAT", "VERDICTS"]

FORMAT = "recipe-diff"
VERSION = 1
VERDICTS = ("better", "worse", "no clear change")
ENV_KEYS = ("python", "torch", "numpy", "sklearn", "threads", "cpu")


def load_board(path: str | Path, store: str | Path | None = None) -> dict:
    """A leaderboard document from a JSON export, a store, or a recipe."""
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe, parse_recipe
    from runner.store.database import Store
    from runner.evidence.leaderboard import FORMAT as BOARD, leaderboard

    path = Path(path)
    if not path.exists():
        raise UserError("file not found", where=str(path),
                        allowed="a leaderboard JSON file, a results store, or a recipe")
    head = path.read_bytes()[:16]
    if head.startswith(b"SQLite format 3"):
        with Store(path, create=False) as db:
            row = db.conn.execute("SELECT text, path FROM recipes ORDER BY first_seen DESC LIMIT 1").fetchone()
            if row is None:
                raise StoreError("the store holds no recipe yet", where=str(path))
            try:
                grid = expand(parse_recipe(row[0], Path(row[1])))
            except UserError as err:
                raise StoreError(f"cannot rebuild this store's grid ({err.message()})", where=str(path),
                                 hint="Pass the recipe or a JSON export of its leaderboard instead") from None
            doc = leaderboard(grid, db)
        doc["source"] = str(path)
        return doc
    if path.suffix == ".toml":
        recipe = load_recipe(path)
        grid = expand(recipe)
        db_path = Path(store) if store else recipe.base_dir / "runs" / f"{recipe.name}.sqlite"
        with Store(db_path, create=False) as db:
            doc = leaderboard(grid, db)
        doc["source"] = str(path)
        return doc
    try:
        doc = json.loads(path.read_text())
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"not a leaderboard JSON file ({exc})", where=str(path),
                        hint="Export one with: recipe board RECIPE --format json --out FILE") from None
    if not isinstance(doc, dict) or doc.get("format") != BOARD:
        raise UserError(f'not a "{BOARD}" document', where=str(path), value=doc.get("format") if isinstance(doc, dict) else None)
    if doc.get("version") != 1:
        raise UserError("unsupported leaderboard version", where=str(path), value=doc.get("version"), allowed="1")
    doc["source"] = str(path)
    return doc


def _verdict(old: dict, new: dict, goal: str) -> tuple[str, dict | None, str]:
    a = list(old["per_seed"].values())
    b = list(new["per_seed"].values())
    if not b and a:
        c = new["counts"]
        return "worse", None, f"no finished seed in new ({c['diverged']} diverged, {c['failed']} failed)"
    if not a and b:
        return "better", None, "no finished seed in old"
    test = stats.welch(b, a)
    if test is None:
        return "no clear change", None, "fewer than 2 seeds on a side"
    if test["p_value"] < 0.05 and test["diff_mean"] != 0:
        up = test["diff_mean"] > 0
        return ("better" if up == (goal == "max") else "worse"), test, ""
    return "no clear change", test, ""


def _changes(old: dict, new: dict) -> list[dict]:
    out = []
    if old.get("metric") != new.get("metric"):
        out.append({"what": "rank metric", "old": old.get("metric"), "new": new.get("metric")})
    ob, nb = old.get("base_settings", {}), new.get("base_settings", {})
    for key in sorted(set(ob) | set(nb)):
        if ob.get(key) != nb.get(key):
            out.append({"what": key, "old": ob.get(key), "new": nb.get(key)})
    if old.get("data") != new.get("data"):
        out.append({"what": "data fingerprint", "old": ",".join(d[:12] for d in old.get("data", [])),
                    "new": ",".join(d[:12] for d in new.get("data", []))})
    oe = (old.get("environment") or {}).get("first") or {}
    ne = (new.get("environment") or {}).get("first") or {}
    for key in ENV_KEYS:
        if oe.get(key) != ne.get(key):
            out.append({"what": key, "old": oe.get(key), "new": ne.get(key)})
    if old.get("seeds") != new.get("seeds"):
        out.append({"what": "seeds", "old": old.get("seeds"), "new": new.get("seeds")})
    return out


def diff(old: dict, new: dict) -> dict:
    if old.get("goal") != new.get("goal") or old.get("metric") != new.get("metric"):
        raise UserError("the two leaderboards rank different metrics, so they cannot be compared",
                        value=f"{old.get('metric')} vs {new.get('metric')}",
                        hint="Export both with the same rank_by")
    goal = new["goal"]
    ident = lambda row: canonical(row["labels"])  # noqa: E731
    old_rows = {ident(r): r for r in old["rows"]}
    new_rows = {ident(r): r for r in new["rows"]}
    configs = []
    for key, nrow in new_rows.items():
        if key not in old_rows:
            continue
        orow = old_rows[key]
        verdict, test, reason = _verdict(orow, nrow, goal)
        move = (orow["rank"] - nrow["rank"]) if orow.get("rank") and nrow.get("rank") else None
        configs.append({
            "labels": nrow["labels"], "levels": nrow["levels"],
            "old": {"mean": orow["mean"], "n": orow["n"], "rank": orow.get("rank")},
            "new": {"mean": nrow["mean"], "n": nrow["n"], "rank": nrow.get("rank")},
            "diff_mean": test["diff_mean"] if test else None, "ci95": test["ci95"] if test else None,
            "p_value": test["p_value"] if test else None, "rank_move": move,
            "verdict": verdict, "reason": reason,
        })
    configs.sort(key=lambda c: (c["new"]["rank"] is None, c["new"]["rank"] or 0))
    return {
        "format": FORMAT, "version": VERSION, "metric": new["metric"], "goal": goal,
        "old": {"recipe": old.get("recipe"), "source": old.get("source")},
        "new": {"recipe": new.get("recipe"), "source": new.get("source")},
        "changes": _changes(old, new),
        "configs": configs,
        "only_old": [old_rows[k]["labels"] for k in old_rows if k not in new_rows],
        "only_new": [new_rows[k]["labels"] for k in new_rows if k not in old_rows],
        "summary": {v: sum(1 for c in configs if c["verdict"] == v) for v in VERDICTS},
    }


def render_diff(d: dict, fmt: str) -> str:
    if fmt == "json":
        return json.dumps(d, indent=2) + "\n"
    md = fmt == "markdown"
    lines = [("### " if md else "") + f"{d['old']['source']} -> {d['new']['source']}",
             "", f"Metric {d['metric']} ({'higher' if d['goal'] == 'max' else 'lower'} is better); "
             "changes judged by Welch's t interval at the 5% level.", ""]
    if d["changes"]:
        lines.append("What else changed:")
        lines += [f"- {c['what']}: {c['old']} -> {c['new']}" for c in d["changes"]]
    else:
        lines.append("Nothing else changed: same settings outside the factors, data, libraries and threads.")
    names = list(d["configs"][0]["labels"]) if d["configs"] else []
    body = []
    for c in d["configs"]:
        move = "-" if c["rank_move"] is None else (f"{c['rank_move']:+d}" if c["rank_move"] else "0")
        body.append([*[str(c["labels"][n]) for n in names], _num(c["old"]["mean"]), _num(c["new"]["mean"]),
                     "-" if c["diff_mean"] is None else f"{c['diff_mean']:+.4f}", _ci(c["ci95"]),
                     _p(c["p_value"]), f"{c['old']['rank'] or '-'}->{c['new']['rank'] or '-'} ({move})",
                     c["verdict"] + (f" ({c['reason']})" if c["reason"] else "")])
    lines += [""] + _grid_text([*names, "old", "new", "change", "95% CI", "p", "rank", "verdict"], body, md)
    for side in ("only_old", "only_new"):
        if d[side]:
            lines += ["", f"Only in {side[5:]}: " + "; ".join(", ".join(f"{k} = {v}" for k, v in l.items())
                                                        for l in d[side])]
    s = d["summary"]
    lines += ["", f"{s['better']} better, {s['worse']} worse, {s['no clear change']} no clear change."]
    return "\n".join(lines) + "\n"
