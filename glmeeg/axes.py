"""Labels of the points of a map.

A map is stored flat, one value per point, where a point is one channel x time sample (or one
channel x frequency x time sample for time-frequency data). :class:`Axes` carries the labels and
the shape and turns flat vectors back into labelled arrays. The flat order is C order over
``(channel, time)`` or ``(channel, frequency, time)``, the order of a subject's epoch array
reshaped to ``(epochs, points)``.
"""

from __future__ import annotations

from functools import cached_property

import numpy as np
import pandas as pd
from pydantic import BaseModel, ConfigDict, field_validator, model_validator

__all__ = ["Axes"]


class Axes(BaseModel):
    """Channel names, times (s) and, for time-frequency maps, frequencies (Hz).

    Examples
    --------
    >>> ax = Axes(channels=("Cz", "Pz"), times=(0.0, 0.004, 0.008))
    >>> ax.shape, ax.n_points
    ((2, 3), 6)
    >>> ax.unflatten(np.arange(6.0))[1]
    array([3., 4., 5.])
    """

    model_config = ConfigDict(frozen=True, extra="forbid")

    channels: tuple[str, ...]
    times: tuple[float, ...]
    frequencies: tuple[float, ...] | None = None

    @field_validator("channels")
    @classmethod
    def _unique_channels(cls, v: tuple[str, ...]) -> tuple[str, ...]:
        if not v:
            raise ValueError("at least one channel is needed")
        seen: set[str] = set()
        dupes = [c for c in v if c in seen or seen.add(c)]
        if dupes:
            raise ValueError(f"channel names must be unique; repeated: {', '.join(dupes)}")
        return v

    @model_validator(mode="after")
    def _non_empty(self) -> "Axes":
        if not self.times:
            raise ValueError("at least one time sample is needed")
        if self.frequencies is not None and not self.frequencies:
            raise ValueError("frequencies, when given, must not be empty")
        return self

    @property
    def dims(self) -> tuple[str, ...]:
        """Dimension names in storage order."""
        if self.frequencies is None:
            return ("channel", "time")
        return ("channel", "frequency", "time")

    @property
    def shape(self) -> tuple[int, ...]:
        """Shape of one map in storage order."""
        if self.frequencies is None:
            return (len(self.channels), len(self.times))
        return (len(self.channels), len(self.frequencies), len(self.times))

    @property
    def n_points(self) -> int:
        """Number of points (product of :attr:`shape`)."""
        return int(np.prod(self.shape))

    def unflatten(self, values: np.ndarray) -> np.ndarray:
        """Reshape ``(..., n_points)`` to ``(..., *shape)``."""
        values = np.asarray(values)
        if values.shape[-1] != self.n_points:
            raise ValueError(f"expected {self.n_points} points in the last axis, got {values.shape[-1]}")
        return values.reshape(values.shape[:-1] + self.shape)

    @cached_property
    def _point_labels(self) -> pd.DataFrame:
        grids = np.meshgrid(*[np.arange(n) for n in self.shape], indexing="ij")
        cols: dict[str, np.ndarray] = {"channel": np.asarray(self.channels, dtype=object)[grids[0].ravel()]}
        if self.frequencies is not None:
            cols["frequency"] = np.asarray(self.frequencies)[grids[1].ravel()]
        cols["time"] = np.asarray(self.times)[grids[-1].ravel()]
        return pd.DataFrame(cols)

    def point_labels(self) -> pd.DataFrame:
        """One row per point, in flat order: ``channel``, (``frequency``,) ``time`` in seconds."""
        return self._point_labels.copy()
