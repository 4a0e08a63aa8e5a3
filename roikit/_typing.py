"""Shared type aliases (private)."""

from __future__ import annotations

import os
from typing import Literal, Union

import numpy as np

PathLike = Union[str, "os.PathLike[str]"]
Statistic = Literal["mean", "median", "trimmed-mean", "weighted-mean"]
Seed = Union[int, np.random.Generator, None]
ArrayLike = Union[np.ndarray, list, tuple]
