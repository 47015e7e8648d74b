"""The cautions printed under a leaderboard: what its numbers mean and where they could
mislead, in words a practitioner can paste into a review."""

from __future__ import annotations

from typing import TYPE_CHECKING

from runner.evidence.paired import min_attainable_p, seeds_for_any_verdict
from runner.evidence.protocols import Resampling

if TYPE_CHECKING:
    from runner.evidence.document import Row
    from runner.evidence.verdicts import Assessment
    from runner.recipe.grid import Grid

__all__ = ["cautions"]


def _test(grid: Grid, rows: list[Row]) -> str:
    return (f"Ranked on {grid.rank_by}; {grid.rank_by.replace('val.', 'test.', 1)} is shown beside it: the test "
            "rows are drawn once (data.split.test_seed) and are the same for every job, and no choice used "
            "them. Choosing a configuration by its test score would make that score optimistic.")  # fmt: skip


def _protocol(protocol: Resampling) -> str:
    if protocol.kind == "fixed":
        return ("One fixed train/validation split: seeds vary initialization, mini-batch order and dropout "
                "only, so the verdicts are about this split of the data.")  # fmt: skip
    if protocol.kind == "resample":
        return ("Each seed draws its own train/validation split; because the training sets overlap, "
                "intervals use the corrected variance (1/n + n_val/n_train) s^2 (Nadeau & Bengio 2003).")  # fmt: skip
    return (f"Each seed is one repetition of {protocol.folds}-fold cross-validation; a seed's value is its "
            "fold mean, and intervals use the corrected repeated k-fold variance "
            "(Bouckaert & Frank 2004).")  # fmt: skip


def _verdicts(found: Assessment, grid: Grid, margin: float) -> list[str]:
    alpha = grid.recipe.verdicts.alpha
    seeds = sorted({s for s, _ in found.units})
    if found.best_set is None:
        return []
    out = [f"Possibly best: every configuration that is truly best is in this set with probability at least "
           f"{1 - alpha:.0%} (simultaneous intervals over {found.best_set.k} configurations on {len(seeds)} matched "
           "seeds; the error rates are measured in bench/verdicts.py). Behind: another configuration is "
           "better at that level. Rows that cannot be separated are not called tied: the interval shows how "
           "far each may still trail the best of the others."]  # fmt: skip
    if margin:
        out.append(f"Within +-{margin:g}: both simultaneous bounds of the gap to the best lie inside +-{margin:g} "
                   "(two one-sided tests, Schuirmann 1987).")  # fmt: skip
    return out


def _few_seeds(found: Assessment, grid: Grid, protocol: Resampling) -> list[str]:
    seeds = sorted({s for s, _ in found.units})
    if len(grid.recipe.seeds) < 2:
        return ["Only one seed: no interval or verdict can tell configurations apart; add seeds."]
    out = []
    if found.best_set is None and any(v.kind == "no_verdict" for v in found.verdicts.values()):
        out.append("No verdicts yet: they need at least 2 configurations with 2 seeds finished in common.")
    if protocol.kind == "fixed" and 2 <= len(seeds) < seeds_for_any_verdict(grid.recipe.verdicts.alpha):
        floor = min_attainable_p(len(seeds))
        out.append(f"Pairwise p-values (JSON vs_best) are exact sign-flip tests: with {len(seeds)} seeds none can "
                   f"be below {floor:.3g}, so no single pairwise difference can be significant at "
                   f"{grid.recipe.verdicts.alpha:g}; the possibly-best set pools all configurations.")  # fmt: skip
    return out


def _rows(rows: list[Row], grid: Grid) -> list[str]:
    out = []
    broken = [r for r in rows if not r.complete]
    if broken:
        out.append(f"{len(broken)} configuration(s) had a seed that diverged, failed or timed out: they rank "
                   "below the others and get no verdict (a configuration is never ranked on its surviving "
                   "seeds).")  # fmt: skip
    pending = sum(r.counts.pending for r in rows)
    if pending:
        out.append(f"{pending} job(s) pending: the verdicts rest on the seeds every configuration has finished.")
    if any(c.settings.train.patience > 0 for c in grid.configs):
        out.append("Early-stopped rows report the validation metric of their best epoch, a maximum over epochs "
                   "(optimistic for that row); the median best epoch is shown.")  # fmt: skip
        if grid.metric != grid.monitor:
            out.append(f"Early stopping chose epochs by val.{grid.monitor}; this board ranks on {grid.rank_by}.")
    return out


def cautions(rows: list[Row], grid: Grid, protocol: Resampling, found: Assessment, margin: float) -> list[str]:
    return [_test(grid, rows), _protocol(protocol), *_verdicts(found, grid, margin),
            *_few_seeds(found, grid, protocol), *_rows(rows, grid)]  # fmt: skip
