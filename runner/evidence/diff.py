"""Compare two leaderboards of one grid (last week's and today's): configurations matched by
their level labels, each change judged by the gate (gate.py).

When both sides share at least two seeds, the data fingerprint, the test rows and the split
settings, a seed's two values saw the same data order and initial weights, so changes are
paired by seed (exact sign-flip test on a fixed split; the corrected t when splits are
redrawn per seed); otherwise Welch's unpaired t, and the header says which. Holm's correction
across configurations keeps the chance of any false alarm at the board's level
(bench/verdicts.py measures it). The board's rule holds: a configuration with a seed that did
not finish is not compared on its survivors; if that happened only in the new run it counts
as a regression, only in the old one as an improvement.

Inputs may be leaderboard JSON files (``recipe board --format json``), result stores, or
recipes (read through their default store).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

from runner.components.metrics import Goal
from runner.errors import StoreError, UserError
from runner.evidence.document import FORMAT as BOARD
from runner.evidence.document import Leaderboard, Row
from runner.evidence.gate import compare_runs, pairing
from runner.evidence.protocols import FIXED, Resampling
from runner.files import read_bounded, read_head
from runner.outputs.text import grid_lines, interval, number, p_text, signed
from runner.recipe.grid import canonical

__all__ = ["FORMAT", "VERDICTS", "ConfigChange", "Diff", "diff", "load_board", "render_diff"]

FORMAT = "recipe-diff"
VERSION = 2
VERDICTS = ("regressed", "improved", "no shift shown", "too few seeds", "not comparable")
ENV_KEYS = ("python", "torch", "numpy", "sklearn", "threads", "cpu")
MAX_BOARD_BYTES = 1 << 28  # a leaderboard JSON of a very large grid is a few MB


@dataclass(frozen=True)
class Side:
    mean: float | None
    n: int
    rank: int | None


@dataclass(frozen=True)
class ConfigChange:
    """One configuration present in both leaderboards: change = new - old (metric units),
    its 95% interval, p for |true change| > min_change, Holm-adjusted, the verdict."""

    labels: dict[str, str]
    levels: dict[str, Any]
    old: Side
    new: Side
    change: float | None
    ci95: list[float] | None
    p_value: float | None
    p_holm: float | None
    rank_move: int | None
    verdict: str
    reason: str


@dataclass(frozen=True)
class Diff:
    metric: str
    goal: Goal
    old: dict[str, str | None]  # recipe, source
    new: dict[str, str | None]
    method: str  # how changes were judged (paired by seed or Welch, and why)
    alpha: float
    min_change: float
    changes: list[dict[str, Any]]  # what else changed: what, old, new
    configs: list[ConfigChange]
    only_old: list[dict[str, str]]
    only_new: list[dict[str, str]]
    summary: dict[str, int]

    @property
    def failed(self) -> bool:
        """Whether any configuration regressed (the CI gate's answer)."""
        return self.summary["regressed"] > 0

    def to_json(self) -> dict[str, Any]:
        out = {"format": FORMAT, "version": VERSION, **asdict(self)}
        out["goal"] = self.goal.value
        return out


def load_board(path: str | Path, store: str | Path | None = None) -> Leaderboard:
    """A leaderboard from a JSON export, a store, or a recipe."""
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
    if doc.get("version") not in (1, 2):
        raise UserError("unsupported leaderboard version", where=str(path), value=doc.get("version"), allowed="1, 2")
    try:
        return Leaderboard.from_json(doc, source=str(path))
    except (KeyError, TypeError, ValueError, AttributeError) as exc:  # edited by hand, or cut short
        raise UserError(
            f"the leaderboard JSON is damaged ({type(exc).__name__}: {str(exc)[:100]})",
            where=str(path),
            hint="Export it again with: recipe board RECIPE --format json --out FILE",
        ) from None


def _changes(old: Leaderboard, new: Leaderboard) -> list[dict[str, Any]]:
    out = []
    ob, nb = old.base_settings, new.base_settings
    for key in sorted(set(ob) | set(nb)):
        if ob.get(key) != nb.get(key):
            out.append({"what": key, "old": ob.get(key), "new": nb.get(key)})
    for what in ("fingerprints", "test_fingerprints"):
        a, b = old.data.get(what, []), new.data.get(what, [])
        if a != b:
            out.append({"what": f"data {what.replace('_', ' ')}", "old": ",".join(d[:12] for d in a),
                        "new": ",".join(d[:12] for d in b)})  # fmt: skip
    oe, ne = old.environment.first or {}, new.environment.first or {}
    out += [{"what": k, "old": oe.get(k), "new": ne.get(k)} for k in ENV_KEYS if oe.get(k) != ne.get(k)]
    if old.seeds != new.seeds:
        out.append({"what": "seeds", "old": old.seeds, "new": new.seeds})
    return out


def _split_key(board: Leaderboard) -> dict[str, Any]:
    return {k: v for k, v in board.protocol.items() if k in ("validation", "folds", "test_seed")}


def _protocol(board: Leaderboard) -> Resampling:
    p = board.protocol
    if p.get("validation") == "resample" and p.get("n_val") and p.get("n_train"):
        return Resampling.resample(p["n_val"], p["n_train"])
    return FIXED  # fixed split; under folds each seed's value is already its fold mean


def _diff_seeds(board: Leaderboard) -> list[int]:
    """The seeds a diff pairs on: an adaptive run's first round (every configuration got
    those before the race decided anything, so which seeds exist cannot depend on the values)."""
    return list(board.race["first_seeds"]) if board.race else list(board.seeds)


def _on(row: Row, board: Leaderboard) -> list[float]:
    """A row's per-seed values on the seeds the diff uses (unpaired comparisons)."""
    seeds = {str(s) for s in _diff_seeds(board)}
    return [v for s, v in row.per_seed.items() if s in seeds]


def _failure_verdict(orow: Row, nrow: Row, goal: Goal) -> tuple[str, str] | None:
    if orow.complete and not nrow.complete:
        return "regressed", "a seed diverged, failed or timed out in the new run"
    if nrow.complete and not orow.complete:
        return "improved", "every seed finished in the new run, not in the old"
    if not (orow.complete and nrow.complete):
        return "not comparable", "seeds did not finish on both sides"
    if not orow.per_seed or not nrow.per_seed:
        return "not comparable", "no finished seed on a side"
    return None


def diff(old: Leaderboard, new: Leaderboard, alpha: float = 0.05, min_change: float = 0.0) -> Diff:
    if old.goal != new.goal or old.metric != new.metric:
        raise UserError("the two leaderboards rank different metrics, so they cannot be compared",
                        value=f"{old.metric} vs {new.metric}", hint="Export both with the same rank_by")  # fmt: skip
    old_rows = {canonical(r.labels): r for r in old.rows}
    new_rows = {canonical(r.labels): r for r in new.rows}
    shared = [k for k in new_rows if k in old_rows]
    same_split = bool(new.protocol) and _split_key(old) == _split_key(new) and (
        old.data.get("test_fingerprints") == new.data.get("test_fingerprints"))  # fmt: skip
    same_data = old.data.get("fingerprints") == new.data.get("fingerprints")
    pair = pairing(_diff_seeds(old), _diff_seeds(new), same_data, same_split)
    judged, verdicts = [], {}
    for key in shared:
        found = _failure_verdict(old_rows[key], new_rows[key], new.goal)
        if found is None:
            judged.append(key)
        else:
            verdicts[key] = found
    gate = None
    if judged:
        seeds = [str(s) for s in pair.seeds]
        values = [([old_rows[k].per_seed[s] for s in seeds if s in old_rows[k].per_seed and s in new_rows[k].per_seed],
                   [new_rows[k].per_seed[s] for s in seeds if s in old_rows[k].per_seed and s in new_rows[k].per_seed])
                  if pair.paired else (_on(old_rows[k], old), _on(new_rows[k], new))
                  for k in judged]  # fmt: skip
        gate = compare_runs([o for o, _ in values], [n for _, n in values], str(new.goal), paired=pair.paired,
                            alpha=alpha, min_change=min_change, protocol=_protocol(new))  # fmt: skip
    configs = [_config(old_rows[k], new_rows[k], verdicts.get(k), gate, judged) for k in shared]
    configs.sort(key=lambda c: (c.new.rank is None, c.new.rank or 0))
    method = pair.reason + (f"; Holm across {len(judged)} configurations" if judged else "")
    return Diff(metric=new.metric, goal=new.goal, old={"recipe": old.recipe, "source": old.source},
                new={"recipe": new.recipe, "source": new.source}, method=method, alpha=alpha, min_change=min_change,
                changes=_changes(old, new), configs=configs,
                only_old=[old_rows[k].labels for k in old_rows if k not in new_rows],
                only_new=[new_rows[k].labels for k in new_rows if k not in old_rows],
                summary={v: sum(1 for c in configs if c.verdict == v) for v in VERDICTS})  # fmt: skip


def _config(orow: Row, nrow: Row, failure, gate, judged: list[str]) -> ConfigChange:
    move = (orow.rank - nrow.rank) if orow.rank and nrow.rank else None
    sides = {"labels": nrow.labels, "levels": nrow.levels, "old": Side(orow.mean, orow.n, orow.rank),
             "new": Side(nrow.mean, nrow.n, nrow.rank), "rank_move": move}  # fmt: skip
    if failure is not None:
        change = None if orow.mean is None or nrow.mean is None else nrow.mean - orow.mean
        return ConfigChange(**sides, change=change, ci95=None, p_value=None, p_holm=None, verdict=failure[0],
                            reason=failure[1])  # fmt: skip
    c = gate.changes[judged.index(canonical(nrow.labels))]
    ci = [c.low, c.high] if c.low is not None else None
    return ConfigChange(**sides, change=c.change, ci95=ci, p_value=c.p_value, p_holm=c.p_adjusted, verdict=c.verdict,
                        reason=c.method)  # fmt: skip


def render_diff(d: Diff, fmt: str) -> str:
    if fmt == "json":
        return json.dumps(d.to_json(), indent=2) + "\n"
    md = fmt == "markdown"
    floor = f", changes smaller than {d.min_change:g} not counted" if d.min_change else ""
    lines = [("### " if md else "") + f"{d.old['source']} -> {d.new['source']}", "",
             f"Metric {d.metric} ({d.goal.words}); {d.method}; level {d.alpha:g}{floor}.", ""]  # fmt: skip
    if d.changes:
        lines.append("What else changed:")
        lines += [f"- {c['what']}: {c['old']} -> {c['new']}" for c in d.changes]
    else:
        lines.append("Nothing else changed: same settings outside the factors, data, test rows, libraries and threads.")
    names = list(d.configs[0].labels) if d.configs else []
    body = []
    for c in d.configs:
        move = "-" if c.rank_move is None else (f"{c.rank_move:+d}" if c.rank_move else "0")
        body.append([*[str(c.labels[n]) for n in names], number(c.old.mean), number(c.new.mean), signed(c.change),
                     interval(c.ci95), p_text(c.p_holm), f"{c.old.rank or '-'}->{c.new.rank or '-'} ({move})",
                     c.verdict])  # fmt: skip
    header = [*names, "old", "new", "change", "95% CI", "p (Holm)", "rank", "verdict"]
    lines += ["", *grid_lines(header, body, md)]
    notes = [f"{', '.join(c.labels.values()) or 'base'}: {c.reason}" for c in d.configs
             if c.verdict in ("regressed", "improved", "not comparable", "too few seeds")]  # fmt: skip
    if notes:
        lines += ["", *notes]
    for name, side in (("old", d.only_old), ("new", d.only_new)):
        if side:
            lines += ["", f"Only in {name}: " + "; ".join(", ".join(f"{k} = {v}" for k, v in labels.items())
                                                        for labels in side)]  # fmt: skip
    s = d.summary
    lines += ["", ", ".join(f"{s[v]} {v}" for v in VERDICTS if s[v] or v in ("regressed", "improved")) + "."]
    return "\n".join(lines) + "\n"
