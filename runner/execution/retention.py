"""Which trained weights the store keeps ([run] keep_weights).

"all": every done job's weights. "none": none (workers do not even send them; ``recipe
export`` retrains the job it needs, bit for bit). "possibly_best" (the default): every done
job's weights are stored as it finishes, and when a run ends the weights of configurations
the leaderboard has ruled out as the best are dropped. Deciding at the end, from the whole
board, means an interrupted run never drops weights on partial evidence; a configuration
that is dropped and later needed is retrained exactly.
"""

from __future__ import annotations

from dataclasses import dataclass

from runner.evidence.document import Leaderboard
from runner.recipe.grid import Grid
from runner.store.database import Store

__all__ = ["KEEP_CHOICES", "Retained", "possibly_best_ids", "retain"]

KEEP_CHOICES = ("all", "none", "possibly_best")


def possibly_best_ids(doc: Leaderboard) -> set[str]:
    """Configurations the board cannot rule out as the best: its possibly-best set, and
    every row without a verdict yet (too few seeds to rule anything out: nothing is dropped
    on no evidence) except rows whose seeds did not all finish."""
    return {row.config_id for row in doc.rows if row.possibly_best or (row.possibly_best is None and row.complete)}


@dataclass(frozen=True)
class Retained:
    jobs: int  # jobs of this grid whose weights the store keeps
    configs: int  # their configurations
    size: int  # bytes of those weights
    dropped: int  # jobs whose weights were dropped now

    def describe(self) -> str:
        kb = self.size / 1024
        text = f"weights kept for {self.jobs} jobs of {self.configs} configurations ({kb:.0f} KiB)"
        return text + (f"; {self.dropped} dropped (not possibly best)" if self.dropped else "")


def retain(grid: Grid, store: Store, doc: Leaderboard, keep: str) -> Retained:
    """Apply ``keep`` to this grid's stored weights after a run."""
    config_of = {j.key: j.config.id for j in grid}
    kept = store.weights_kept(config_of)
    dropped = 0
    if keep != "all":
        wanted = possibly_best_ids(doc) if keep == "possibly_best" else set()
        drop = [k for k in kept if config_of[k] not in wanted]
        dropped = store.drop_weights(drop)
        kept = {k: n for k, n in kept.items() if k not in set(drop)}
    return Retained(jobs=len(kept), configs=len({config_of[k] for k in kept}), size=sum(kept.values()), dropped=dropped)
