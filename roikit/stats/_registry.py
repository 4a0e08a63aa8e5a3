"""Registry of group designs (private).

A design is a function ``f(values, *, participants, confidence, **options) -> DataFrame`` that returns one row per
region x term with the contract's result columns except ``p_holm``, ``p_fdr`` and ``p_fwe`` (which
:func:`roikit.stats.run_design` adds across the regions of the same design and term). Designs register themselves::

    from roikit.stats._registry import register

    @register("one-sample", permutation=_one_sample_max_t)
    def one_sample(values, *, participants, confidence, contrast):
        ...

A design that supports permutation family-wise error registers a ``permutation`` function with the signature
``g(values, *, participants, permutations, rng, **options) -> dict[term, ndarray]`` giving, for each term, the
family-wise p-values of the regions in the order of the design's rows for that term, plus the key ``"_exact"``
(bool) and ``"_n_permutations"`` (int, the number actually used).
"""

from __future__ import annotations

from typing import Callable

from ..errors import UsageError

__all__ = ["DESIGNS", "PERMUTATIONS", "register", "get_design", "available_designs"]

#: Design name -> design function (see module docstring).
DESIGNS: dict[str, Callable] = {}

#: Design name -> permutation function for max-statistic family-wise error (optional per design).
PERMUTATIONS: dict[str, Callable] = {}


def register(name: str, *, permutation: Callable | None = None) -> Callable[[Callable], Callable]:
    """Decorator registering a design function under ``name`` (as written after ``--design``).

    Parameters
    ----------
    name : str
        The design's name, e.g. ``"one-sample"``.
    permutation : callable, optional
        Max-statistic permutation function for this design (see module docstring).
    """
    if not isinstance(name, str) or not name:
        raise UsageError(f"design name must be a non-empty string, got {name!r}")

    def decorator(func: Callable) -> Callable:
        previous = DESIGNS.get(name)
        if previous is not None and previous is not func and (
            getattr(previous, "__qualname__", None) != getattr(func, "__qualname__", None)
            or getattr(previous, "__module__", None) != getattr(func, "__module__", None)
        ):
            raise UsageError(
                f"design {name!r} is already registered by {previous.__module__}.{previous.__qualname__}; "
                "choose another name"
            )
        DESIGNS[name] = func
        if permutation is not None:
            PERMUTATIONS[name] = permutation
        func.design_name = name
        return func

    return decorator


def available_designs() -> list[str]:
    """Names of the registered designs, in registration order."""
    return list(DESIGNS)


def get_design(name: str) -> Callable:
    """The design function registered as ``name``; a :class:`UsageError` naming the available ones otherwise."""
    try:
        return DESIGNS[name]
    except (KeyError, TypeError):
        raise UsageError(
            f"design {name!r} is not available; expected one of: {', '.join(available_designs()) or '(none)'}"
        ) from None
