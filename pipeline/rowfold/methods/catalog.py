"""Every factorization method, registered in this one place.

An entry gives the name a job file uses, the options the method takes (besides
``precision``, which every method takes), where its factor function lives, and the published
loss-of-orthogonality bound the report states beside the measured figure. The module holds
text and tuples only, so validating a job file (and ``rowfold --help``) imports no numerics;
the factor function is imported on first use.

Adding a method: write its module in :mod:`rowfold.methods` with a function that follows
:class:`~rowfold.methods.base.Method`, add one :class:`MethodEntry` here, and document it in
README's Methods table.
"""

from __future__ import annotations

from dataclasses import dataclass

# A constant of a published bound that was recalled rather than read again at its source.
RECALLED = "constant recalled from the literature, not re-checked"


@dataclass(frozen=True, slots=True)
class Bound:
    """A published loss-of-orthogonality bound (see CHECKS.md).

    Attributes
    ----------
    formula : str
        One of the formulas :func:`rowfold.quality.published_bound` evaluates: ``"10 n u"``
        (a bound of order u with a constant that is common practice, not published),
        ``"6 (m n u + n (n+1) u)"`` or ``"10 n u kappa"``.
    source : str
        Where the bound is published.
    """

    formula: str
    source: str


@dataclass(frozen=True, slots=True)
class MethodEntry:
    """One factorization method.

    Attributes
    ----------
    name : str
        ``method.name`` in a job file.
    factor : str
        ``"module:function"`` inside :mod:`rowfold.methods`.
    options : tuple of str
        The ``method.*`` keys it takes besides ``name`` and ``precision``.
    bound : Bound
        Its published loss-of-orthogonality bound.
    reorthogonalized_bound : Bound or None
        The bound with ``reorthogonalize: true``, for a method that has the option.
    """

    name: str
    factor: str
    options: tuple[str, ...]
    bound: Bound
    reorthogonalized_bound: Bound | None = None


TSQR_BOUND = Bound(
    "10 n u",
    "O(u) for any tree: Higham 2002 ch. 19; Demmel, Grigori, Hoemmen, Langou, SISC 34(1) 2012",
)
CATALOG: tuple[MethodEntry, ...] = (
    MethodEntry("tsqr", "tsqr:factor", ("tree",), TSQR_BOUND),
    MethodEntry(
        "cholqr2",
        "cholesky:cholqr2",
        (),
        Bound(
            "6 (m n u + n (n+1) u)",
            "Yamamoto, Nakatsukasa, Yanagisawa, Fukaya, ETNA 44 (2015), for kappa below ~1e8; "
            + RECALLED,
        ),
    ),
    MethodEntry(
        "scholqr3",
        "cholesky:scholqr3",
        (),
        Bound(
            "6 (m n u + n (n+1) u)",
            "O(u): Fukaya, Kannan, Nakatsukasa, Yamamoto, Yanagisawa, SISC 42(1) 2020; " + RECALLED,
        ),
    ),
    MethodEntry(
        "bcgs2",
        "gram_schmidt:bcgs2",
        ("panel", "inner"),
        Bound("10 n u", "O(u): Barlow & Smoktunowicz, Numer. Math. 123 (2013)"),
    ),
    MethodEntry(
        "bmgs",
        "gram_schmidt:bmgs",
        ("panel", "inner", "reorthogonalize"),
        Bound("10 n u kappa", "O(u kappa): Jalby & Philippe, SISC 12(5) 1991; " + RECALLED),
        Bound(
            "10 n u",
            "O(u) with a second projection: Barlow & Smoktunowicz, Numer. Math. 123 (2013)",
        ),
    ),
    MethodEntry(
        "rcholqr",
        "rcholqr:factor",
        ("sketch", "sketch_rows", "seed"),
        Bound("10 n u", "O(u): Higgins, Szyld, Boman, Yamazaki 2023 (arXiv 2309.05868)"),
    ),
    # auto reports the bound of the method it used; its own entry is never the one stated.
    MethodEntry("auto", "auto:factor", (), TSQR_BOUND),
)
METHODS: dict[str, MethodEntry] = {entry.name: entry for entry in CATALOG}
METHOD_NAMES: tuple[str, ...] = tuple(METHODS)


def bound_of(name: str, reorthogonalize: bool) -> tuple[str, Bound]:
    """The bound the report states for method ``name`` and the key it is reported under
    (``"bmgs+reorthogonalize"`` for bmgs with its second projection); an unknown name gets
    tsqr's."""
    entry = METHODS.get(name, METHODS["tsqr"])
    if reorthogonalize and entry.reorthogonalized_bound is not None:
        return f"{entry.name}+reorthogonalize", entry.reorthogonalized_bound
    return entry.name, entry.bound
