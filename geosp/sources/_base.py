"""What every source model shares: per-station positions and the parameter count."""

from __future__ import annotations

import copy


class SourceModel:
    """
    Base of the source models: a model holds per-station arrays (the
    attributes named in ``per_station``) and its parameter bounds
    ``lower``/``upper``.
    """

    per_station = ("along", "across")

    def subset(self, index):
        """The same model seen by the stations at ``index`` only."""
        out = copy.copy(self)
        for name in self.per_station:
            setattr(out, name, getattr(self, name)[index])
        return out

    @property
    def k(self):
        """Number of nonlinear parameters."""
        return self.lower.size
