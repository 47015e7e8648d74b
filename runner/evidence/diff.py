"""Compare two leaderboards: configurations matched by their level labels, each change
judged with Welch's unpaired interval (the runs are separate, so seeds do not pair).

Inputs may be leaderboard JSON files (``recipe board --format json``), result stores, or
recipes (read through their default store).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from runner.components.metrics import Goal
from runner.errors import StoreError, UserError
from runner.evidence import stats
from runner.evidence.document import FORMAT as BOARD
from runner.evidence.document import FORMAT_VERSION as BOARD_VERSION
from runner.evidence.document import Leaderboard, Row
from runner.files import read_bounded, read_head
from runner.outputs.text import grid_lines, interval, number, p_text
from runner.recipe.grid import canonical

__all__ = ["FORMAT", "VERDICTS", "ConfigChange", "Diff", "diff", "load_board", "render_diff"]

FORMAT = "recipe-diff"
VERSION = 1
VERDICTS = ("better", "worse", "no clear change")
ENV_KEYS = ("python", "torch", "numpy", "sklearn", "threads", "cpu")
MAX_BOARD_BYTES = 1 << 28  # a leaderboard JSON of a very large grid is a few MB


@dataclass(frozen=True)
class Side:
    mean: float | None
    n: int
    rank: int | None


@dataclass(frozen=True)
class ConfigChange:
    """One configuration present in both leaderboards."""

    labels: dict[str, str]
    levels: dict[str, Any]
    old: Side
    new: Side
    diff_mean: float | None
    ci95: list[float] | None
    p_value: float | None
    rank_move: int | None
    verdict: str
    reason: str


@dataclass(frozen=True)
class Diff:
    metric: str
    goal: Goal
    old: dict[str, str | None]  # recipe, source
    new: dict[str, str | None]
    changes: list[dict[str, Any]]  # what, old, new
    configs: list[ConfigChange]
    only_old: list[dict[str, str]]
    only_new: list[dict[str, str]]
    summary: dict[str, int]

    def to_json(self) -> dict[str, Any]:
        out = {"format": FORMAT, "version": VERSION, **asdict(self)}
        out["goal"] = self.goal.value
        return out


def load_board(path: str | Path, store: str | Path | None = None) -> Leaderboard:
    """A leaderboard from a JSON export, a store, or a recipe."""
    from dataclasses import replace

    from runner.evidence.leaderboard import leaderboard
    from runner.recipe.grid import expand
    from runner.recipe.loader import load_recipe, parse_recipe
    from runner.store.database import Store

    path = Path(path)
    if not path.exists():
        raise UserError(
            "file not found", where=str(path), allowed="a leaderboard JSON file, a results store, or a recipe"
        )
    head = read_head(path, 16, "leaderboard file")  # a regular file: not a FIFO or /dev/zero
    if head.startswith(b"SQLite format 3"):
        with Store(path, create=False) as db:
            row = db.latest_recipe()
            if row is None:
                raise StoreError("the store holds no recipe yet", where=str(path))
            try:
                grid = expand(parse_recipe(row[0], Path(row[1])))
            except UserError as err:
                raise StoreError(
                    f"cannot rebuild this store's grid ({err.message()})",
                    where=str(path),
                    hint="Pass the recipe or a JSON export of its leaderboard instead",
                ) from None
            return replace(leaderboard(grid, db), source=str(path))
    if path.suffix == ".toml":
        recipe = load_recipe(path)
        grid = expand(recipe)
        db_path = Path(store) if store else recipe.base_dir / "runs" / f"{recipe.name}.sqlite"
        with Store(db_path, create=False) as db:
            return replace(leaderboard(grid, db), source=str(path))
    try:
        doc = json.loads(read_bounded(path, MAX_BOARD_BYTES, "leaderboard file").decode())
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError) as exc:
        raise UserError(
            f"not a leaderboard JSON file ({exc})",
            where=str(path),
            hint="Export one with: recipe board RECIPE --format json --out FILE",
        ) from None
    if not isinstance(doc, dict) or doc.get("format") != BOARD:
        raise UserError(
            f'not a "{BOARD}" document', where=str(path), value=doc.get("format") if isinstance(doc, dict) else None
        )
    if doc.get("version") != BOARD_VERSION:
        raise UserError(
            "unsupported leaderboard version", where=str(path), value=doc.get("version"), allowed=str(BOARD_VERSION)
        )
    try:
        return Leaderboard.from_json(doc, source=str(path))
    except (KeyError, TypeError, ValueError, AttributeError) as exc:  # edited by hand, or cut short
        raise UserError(
            f"the leaderboard JSON is damaged ({type(exc).__name__}: {str(exc)[:100]})",
            where=str(path),
            hint="Export it again with: recipe board RECIPE --format json --out FILE",
        ) from None


def _verdict(old: Row, new: Row, goal: Goal) -> tuple[str, dict | None, str]:
    a = list(old.per_seed.values())
    b = list(new.per_seed.values())
    if not b and a:
        c = new.counts
        return "worse", None, f"no finished seed in new ({c.diverged} diverged, {c.failed} failed)"
    if not a and b:
        return "better", None, "no finished seed in old"
    test = stats.welch(b, a)
    if test is None:
        return "no clear change", None, "fewer than 2 seeds on a side"
    if test["p_value"] < 0.05 and test["diff_mean"] != 0:
        up = test["diff_mean"] > 0
        return ("better" if up == (goal is Goal.MAX) else "worse"), test, ""
    return "no clear change", test, ""


def _changes(old: Leaderboard, new: Leaderboard) -> list[dict[str, Any]]:
    out = []
    if old.metric != new.metric:
        out.append({"what": "rank metric", "old": old.metric, "new": new.metric})
    ob, nb = old.base_settings, new.base_settings
    for key in sorted(set(ob) | set(nb)):
        if ob.get(key) != nb.get(key):
            out.append({"what": key, "old": ob.get(key), "new": nb.get(key)})
    if old.data != new.data:
        out.append(
            {
                "what": "data fingerprint",
                "old": ",".join(d[:12] for d in old.data),
                "new": ",".join(d[:12] for d in new.data),
            }
        )
    oe = old.environment.first or {}
    ne = new.environment.first or {}
    for key in ENV_KEYS:
        if oe.get(key) != ne.get(key):
            out.append({"what": key, "old": oe.get(key), "new": ne.get(key)})
    if old.seeds != new.seeds:
        out.append({"what": "seeds", "old": old.seeds, "new": new.seeds})
    return out


def diff(old: Leaderboard, new: Leaderboard) -> Diff:
    if old.goal != new.goal or old.metric != new.metric:
        raise UserError(
            "the two leaderboards rank different metrics, so they cannot be compared",
            value=f"{old.metric} vs {new.metric}",
            hint="Export both with the same rank_by",
        )
    goal = new.goal
    old_rows = {canonical(r.labels): r for r in old.rows}
    new_rows = {canonical(r.labels): r for r in new.rows}
    configs = []
    for key, nrow in new_rows.items():
        if key not in old_rows:
            continue
        orow = old_rows[key]
        verdict, test, reason = _verdict(orow, nrow, goal)
        move = (orow.rank - nrow.rank) if orow.rank and nrow.rank else None
        configs.append(
            ConfigChange(
                labels=nrow.labels,
                levels=nrow.levels,
                old=Side(orow.mean, orow.n, orow.rank),
                new=Side(nrow.mean, nrow.n, nrow.rank),
                diff_mean=test["diff_mean"] if test else None,
                ci95=test["ci95"] if test else None,
                p_value=test["p_value"] if test else None,
                rank_move=move,
                verdict=verdict,
                reason=reason,
            )
        )
    configs.sort(key=lambda c: (c.new.rank is None, c.new.rank or 0))
    return Diff(
        metric=new.metric,
        goal=goal,
        old={"recipe": old.recipe, "source": old.source},
        new={"recipe": new.recipe, "source": new.source},
        changes=_changes(old, new),
        configs=configs,
        only_old=[old_rows[k].labels for k in old_rows if k not in new_rows],
        only_new=[new_rows[k].labels for k in new_rows if k not in old_rows],
        summary={v: sum(1 for c in configs if c.verdict == v) for v in VERDICTS},
    )


def render_diff(d: Diff, fmt: str) -> str:
    if fmt == "json":
        return json.dumps(d.to_json(), indent=2) + "\n"
    md = fmt == "markdown"
    lines = [
        ("### " if md else "") + f"{d.old['source']} -> {d.new['source']}",
        "",
        f"Metric {d.metric} ({d.goal.words}); changes judged by Welch's t interval at the 5% level.",
        "",
    ]
    if d.changes:
        lines.append("What else changed:")
        lines += [f"- {c['what']}: {c['old']} -> {c['new']}" for c in d.changes]
    else:
        lines.append("Nothing else changed: same settings outside the factors, data, libraries and threads.")
    names = list(d.configs[0].labels) if d.configs else []
    body = []
    for c in d.configs:
        move = "-" if c.rank_move is None else (f"{c.rank_move:+d}" if c.rank_move else "0")
        body.append(
            [
                *[str(c.labels[n]) for n in names],
                number(c.old.mean),
                number(c.new.mean),
                "-" if c.diff_mean is None else f"{c.diff_mean:+.4f}",
                interval(c.ci95),
                p_text(c.p_value),
                f"{c.old.rank or '-'}->{c.new.rank or '-'} ({move})",
                c.verdict + (f" ({c.reason})" if c.reason else ""),
            ]
        )
    lines += [""] + grid_lines([*names, "old", "new", "change", "95% CI", "p", "rank", "verdict"], body, md)
    for name, side in (("old", d.only_old), ("new", d.only_new)):
        if side:
            lines += [
                "",
                f"Only in {name}: " + "; ".join(", ".join(f"{k} = {v}" for k, v in labels.items()) for labels in side),
            ]
    s = d.summary
    lines += ["", f"{s['better']} better, {s['worse']} worse, {s['no clear change']} no clear change."]
    return "\n".join(lines) + "\n"
