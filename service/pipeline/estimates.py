"""Memory and work of a design, estimated from the request's sizes before anything is computed.

Pure functions of integers, so that a request is refused up front (422 naming the fields that
drive the estimate) instead of exhausting the solver process's memory, and so that a scheduler
can order requests by their work.  They count what the design holds at its peak and the
floating-point operations of its dense linear algebra:

- the stacked prediction matrices ``[Fx Fu G]`` (``(Hp - Hw + 1) p`` rows) and the working
  copies of ``G`` the Hessian and gain products make (weighted, scaled, transposed);
- the Hessian ``H = G'QG + R`` (``Hu m`` square) with its Cholesky factor and the copies the
  exact extreme eigenvalues need (``scipy.linalg.eigh`` works on its own copy plus workspace).

The coefficients are counts of those arrays (three of the size of ``G``, four of ``H``),
checked against a measurement: the example plant (n = 4, m = p = 2) with Hp = Hu = 2000 held
895 MB in its solver process (issue 15 of this project), and :func:`design_memory_bytes` gives
900 MB for it.  Work: ``G'QG`` costs ``2 rows (Hu m)^2``, the factor ``(Hu m)^3 / 3`` and the
symmetric eigenvalues about ``9 (Hu m)^3`` (Golub and Van Loan, Matrix Computations, 4th ed.,
section 8.3, tridiagonal reduction plus QR iteration, rounded up).
"""

from __future__ import annotations

__all__ = ["BASE_BYTES", "G_COPIES", "H_COPIES", "design_memory_bytes", "design_work"]

#: Arrays the size of G alive at the peak (G, its weighted copy, the product's transpose).
G_COPIES = 3
#: Arrays the size of H alive at the peak (H, its Cholesky factor, eigh's copy and workspace).
H_COPIES = 4
#: Bytes of the smaller arrays of any design (plant, gains, poles), a flat allowance.
BASE_BYTES = 4 * 1024 * 1024


def design_memory_bytes(*, states: int, inputs: int, outputs: int, penalized_steps: int, control: int) -> int:
    """Peak bytes of one design's arrays (8-byte floats).

    Parameters
    ----------
    states, inputs, outputs : int
        n, m and p of the discrete plant (dead-time states included).
    penalized_steps : int
        Hp - Hw + 1, the predicted steps in the cost.
    control : int
        Hu, the moves per input the prediction matrix G has columns for.

    Returns
    -------
    int
        ``8 (G_COPIES rows cols + H_COPIES (Hu m)^2 + rows (n + m)) + BASE_BYTES`` with
        ``rows = (Hp - Hw + 1) p`` and ``cols = Hu m``.
    """
    rows, cols = penalized_steps * outputs, control * inputs
    entries = G_COPIES * rows * cols + H_COPIES * cols * cols + rows * (states + inputs)
    return 8 * entries + BASE_BYTES


def design_work(*, states: int, inputs: int, outputs: int, penalized_steps: int, control: int) -> int:
    """Floating-point operations of one design's dense linear algebra (for scheduling and caps).

    ``2 rows cols^2`` for G'QG, ``cols^3 / 3`` for the Cholesky factor, ``9 cols^3`` for the
    extreme eigenvalues and ``2 rows cols n`` for the prediction recursion, with
    ``rows = (Hp - Hw + 1) p`` and ``cols = Hu m``.
    """
    rows, cols = penalized_steps * outputs, control * inputs
    return 2 * rows * cols * cols + cols**3 // 3 + 9 * cols**3 + 2 * rows * cols * max(states, 1)
