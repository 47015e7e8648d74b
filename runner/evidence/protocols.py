"""How the seeds' train/validation splits relate, and what that does to a variance.

With one fixed split, seeds are independent replicates and the mean of n seed-level values
has variance sigma^2 / n. When every seed redraws the split, the training sets overlap and
the seed-level values are correlated, so sigma^2 / n understates the variance. Every
interval and test in runner.evidence takes a ``Resampling`` and asks it for the factor v in
Var(mean) = v * sigma^2.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["FIXED", "Resampling"]

_KINDS = ("fixed", "repeated_kfold", "resample")


@dataclass(frozen=True, slots=True)
class Resampling:
    """The resampling protocol behind a set of seed-level values.

    kind: "fixed" (one split for every seed), "resample" (each seed draws a new split with
    n_val validation and n_train training rows), or "repeated_kfold" (``repeats``
    repetitions of ``folds``-fold cross-validation, one value per fold and repetition).
    """

    kind: str = "fixed"
    n_val: int | None = None
    n_train: int | None = None
    folds: int | None = None
    repeats: int | None = None

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise ValueError(f"resampling kind: unknown {self.kind!r}; allowed: {', '.join(_KINDS)}")
        if self.kind == "resample":
            for name in ("n_val", "n_train"):
                value = getattr(self, name)
                if not isinstance(value, int) or value < 1:
                    raise ValueError(f"resampling {name}: must be an integer >= 1, got {value!r}")
        if self.kind == "repeated_kfold":
            if not isinstance(self.folds, int) or self.folds < 2:
                raise ValueError(f"resampling folds: must be an integer >= 2, got {self.folds!r}")
            if not isinstance(self.repeats, int) or self.repeats < 1:
                raise ValueError(f"resampling repeats: must be an integer >= 1, got {self.repeats!r}")

    @classmethod
    def resample(cls, n_val: int, n_train: int) -> Resampling:
        """Each seed redraws the split: n_val validation rows, n_train training rows."""
        return cls("resample", n_val=n_val, n_train=n_train)

    @classmethod
    def repeated_kfold(cls, folds: int, repeats: int) -> Resampling:
        """``repeats`` repetitions of ``folds``-fold cross-validation."""
        return cls("repeated_kfold", folds=folds, repeats=repeats)

    def variance_factor(self, n: int) -> float:
        """v with Var(mean of n seed-level values) = v * sigma^2.

        fixed: 1/n. resample: 1/n + n_val/n_train (Nadeau & Bengio 2003, corrected
        resampled t). repeated_kfold: 1/(folds*repeats) + 1/(folds - 1), the test/train
        ratio of k-fold being 1/(k - 1) (Bouckaert & Frank 2004, from memory); n must equal
        folds * repeats.
        """
        if n < 1:
            raise ValueError(f"number of seed-level values must be >= 1, got {n}")
        if self.kind == "fixed":
            return 1.0 / n
        if self.kind == "resample":
            return 1.0 / n + self.n_val / self.n_train
        if n != self.folds * self.repeats:
            raise ValueError(f"repeated k-fold: expected folds * repeats = {self.folds * self.repeats} values, got {n}")
        return 1.0 / n + 1.0 / (self.folds - 1)

    def describe(self) -> str:
        """One line for a report: which variance the intervals use."""
        if self.kind == "fixed":
            return "one fixed split: Var(mean) = s^2/n"
        if self.kind == "resample":
            return (
                f"split redrawn per seed ({self.n_val} val / {self.n_train} train rows): "
                f"Var(mean) = (1/n + {self.n_val}/{self.n_train}) s^2 (Nadeau & Bengio 2003)"
            )
        return (
            f"{self.repeats} x {self.folds}-fold cross-validation: Var(mean) = "
            f"(1/n + 1/{self.folds - 1}) s^2 (Bouckaert & Frank 2004)"
        )


FIXED = Resampling()
