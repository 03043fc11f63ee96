"""How much work one evaluator call and one check may do, from the size of a case.

A battery's cost is compilations plus arithmetic. Compilations are kept down by giving every
shape one fixed stack size (:func:`call_size`): the JAX adapter pads a shorter stack up to it and
cuts a longer one into calls of that size, so each (operation, dtype, shape) compiles once,
whatever number of cases a check asks for. Arithmetic is kept down by bounding the number of
logits one call holds (:data:`ELEMENTS_PER_CALL`) and the number of cases a check draws once a
single case is large (:func:`case_count`): a case of (4096, 1000) logits already holds 4096 rows.
"""

from __future__ import annotations

__all__ = ["ELEMENTS_PER_CALL", "MAX_CALL_SIZE", "CASE_ELEMENTS", "call_size", "case_count", "large_case"]

#: Most prediction elements (cases × elements per case) one compiled call holds: 2^20 float64
#: values are 8 MiB, a few milliseconds of arithmetic on one core.
ELEMENTS_PER_CALL = 2**20
#: The stack size for small cases: every stack a battery builds at the menu's shapes fits in one call.
MAX_CALL_SIZE = 128
#: Prediction elements a check's cases may hold together before it draws fewer cases.
CASE_ELEMENTS = 2**21


def _floor_pow2(x: int) -> int:
    p = 1
    while p * 2 <= x:
        p *= 2
    return p


def call_size(case_elements: int) -> int:
    """The fixed number of cases per compiled call for cases of ``case_elements`` elements.

    A power of two, at most :data:`MAX_CALL_SIZE`, at least 1, with
    cases × ``case_elements`` ≤ :data:`ELEMENTS_PER_CALL` whenever one case fits.

    Example:
        >>> call_size(160), call_size(25_600), call_size(4_096_000)
        (128, 32, 1)
    """
    fit = ELEMENTS_PER_CALL // max(int(case_elements), 1)
    return max(1, min(MAX_CALL_SIZE, _floor_pow2(fit) if fit >= 1 else 1))


def case_count(want: int, case_elements: int, least: int = 2) -> int:
    """How many cases to draw when ``want`` are wanted at small shapes.

    ``want`` while ``want`` × ``case_elements`` ≤ :data:`CASE_ELEMENTS`; fewer beyond, never
    fewer than ``least`` (nor more than ``want``).

    Example:
        >>> case_count(48, 640), case_count(48, 4_096_000)
        (48, 2)
    """
    fit = CASE_ELEMENTS // max(int(case_elements), 1)
    return max(min(least, want), min(want, fit))


def large_case(case_elements: int) -> bool:
    """Whether one case of ``case_elements`` elements fills a compiled call alone; arrays of
    such cases are then best worked one case at a time. A stack of them is hundreds of
    megabytes, and every fresh array that large costs page faults out of proportion to its
    arithmetic. On Linux, glibc serves large requests with new memory maps, raising that
    threshold to at most 32 MiB on 64-bit systems (recalled from memory: glibc's
    DEFAULT_MMAP_THRESHOLD_MAX); measured here, `np.abs` of three (4096, 1000) float64 cases took
    19 ms and of one case (31.25 MiB) 2.6 ms.

    Example:
        >>> large_case(160), large_case(4_096_000)
        (False, True)
    """
    return call_size(case_elements) == 1
