"""Memory and work of a request, estimated from its sizes before anything is computed.

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

Beyond the design's arrays, a request holds what it returns and the series it computes:

- a number of an answer (a gain entry, a sample of a series) costs its float64 entry, the
  Python float in the answer's lists and its JSON text: :data:`ANSWER_NUMBER_BYTES` and
  :data:`RUN_NUMBER_BYTES` (measured with ``tracemalloc``: about 63 bytes per number counted of a
  /simulate run of the example plant from 240 to 50 000 steps; about doubled, so that the
  example runs its longest default run, 100 000 steps, inside the default cap);
- a run under limits holds the move QP's matrices (:data:`QP_COPIES` copies of ``H`` and the
  constraint rows: the model, its factor and the solver's workspace);
- a frequency analysis holds the complex responses of its grid (16 bytes a number);
- an identification holds its columns, the fits' simulations and Jacobians, the residual
  checks and the step responses: :data:`IDENTIFY_SAMPLE_BYTES` per sample of each column
  (measured: about 760 bytes on the example plant test; doubled), and with the subspace method
  its block Hankel matrices ``2 k (m + p)`` rows by the samples, with the copies its QR
  factorization and singular value decomposition make.

The serving process holds an answer too, from the solver's reply until its last byte is sent
(``service.api.answer_memory`` bounds those bytes): :data:`SERVED_JSON_NUMBER_BYTES` a number
where the solver writes the JSON (or CSV) itself (/design, /design/export, /simulate: the
pickled reply and the body, about two copies of 25 bytes of text a number), and
:data:`SERVED_MODEL_NUMBER_BYTES` where the serving process rebuilds the response model and
writes it (/design/batch, /design/sweep, /design/compare, /identify), plus
:data:`SERVED_ANSWER_BASE_BYTES` an answer for its keys, labels and headers.  Measured with
``tracemalloc`` around whole requests of random plants (40 x 40, Hp 100 and 20 x 20, Hp 200):
53 and 69-76 bytes a number, a copy of the client's included; rounded up.

``tests/api/test_memory_estimates.py`` checks that each estimate bounds the peak ``tracemalloc``
reports for the whole request in one process, for a few sizes.
"""

from __future__ import annotations

__all__ = [
    "ANSWER_NUMBER_BYTES",
    "BASE_BYTES",
    "G_COPIES",
    "H_COPIES",
    "IDENTIFY_SAMPLE_BYTES",
    "QP_COPIES",
    "RUN_NUMBER_BYTES",
    "SERVED_ANSWER_BASE_BYTES",
    "SERVED_JSON_NUMBER_BYTES",
    "SERVED_MODEL_NUMBER_BYTES",
    "answer_memory_bytes",
    "design_memory_bytes",
    "design_work",
    "frequency_memory_bytes",
    "identify_memory_bytes",
    "served_answer_bytes",
    "simulation_memory_bytes",
]

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


#: Bytes of one number of a design's answer at its peak (see the module notes).
ANSWER_NUMBER_BYTES = 160
#: Bytes of one number of a run's series at its peak (see the module notes).
RUN_NUMBER_BYTES = 120
#: Copies of the move QP's matrices alive in a run under limits.
QP_COPIES = 4
#: Bytes per sample of each column of an identification (see the module notes).
IDENTIFY_SAMPLE_BYTES = 1600


#: Bytes of one number of an answer the solver writes as JSON or CSV, in the serving process.
SERVED_JSON_NUMBER_BYTES = 64
#: Bytes of one number of an answer the serving process writes from its response model.
SERVED_MODEL_NUMBER_BYTES = 96
#: Bytes of one answer in the serving process beside its numbers (keys, labels, headers).
SERVED_ANSWER_BASE_BYTES = 256 * 1024


def answer_memory_bytes(numbers: int) -> int:
    """Bytes of an answer of ``numbers`` numbers (gains, poles, series) at its peak."""
    return ANSWER_NUMBER_BYTES * numbers


def served_answer_bytes(numbers: int, *, written_by_solver: bool, answers: int = 1) -> int:
    """Bytes the serving process holds for ``answers`` answers of ``numbers`` numbers in all.

    ``written_by_solver``: the solver sends the answer's bytes (JSON or CSV), not its model.
    From the solver's reply to the last byte sent (see the module notes).
    """
    per_number = SERVED_JSON_NUMBER_BYTES if written_by_solver else SERVED_MODEL_NUMBER_BYTES
    return per_number * numbers + SERVED_ANSWER_BASE_BYTES * answers


def simulation_memory_bytes(
    *, design_bytes: int, steps: int, numbers_per_step: int, qp_entries: int = 0, report_numbers: int = 0
) -> int:
    """Peak bytes of one run on top of its design.

    Parameters
    ----------
    design_bytes : int
        :func:`design_memory_bytes` of the loop's design (with its answer).
    steps, numbers_per_step : int
        The run's length and the numbers it keeps a step (outputs, measured outputs, setpoints,
        inputs, moves, estimates, disturbances, the true plant's states, the noise).
    qp_entries : int
        Entries of the move QP's ``H`` and constraint rows (0 without limits).
    report_numbers : int
        Numbers the limit report can hold.

    Returns
    -------
    int
        ``design_bytes + RUN_NUMBER_BYTES (steps numbers_per_step + report_numbers) + 8 QP_COPIES qp_entries``.
    """
    return design_bytes + RUN_NUMBER_BYTES * (steps * numbers_per_step + report_numbers) + 8 * QP_COPIES * qp_entries


def frequency_memory_bytes(*, points: int, states: int, loops: int) -> int:
    """Peak bytes of a frequency analysis: the loop's ``states x states`` complex pencil and the
    ``loops x loops`` responses at each point of the grid (16 bytes a number), and the answer's
    series (:data:`ANSWER_NUMBER_BYTES` a number, a dozen curves)."""
    return 16 * (4 * states * states + 8 * loops * loops * points) + ANSWER_NUMBER_BYTES * 12 * points * loops


def identify_memory_bytes(*, samples: int, columns: int, outputs: int, block_rows: int = 0) -> int:
    """Peak bytes of one identification.

    Parameters
    ----------
    samples : int
        Samples per column after resampling (at most the longest column, or the time span over
        the sample time, whichever is more).
    columns : int
        Inputs, measured disturbances and outputs.
    outputs : int
        Controlled outputs.
    block_rows : int
        ``k`` of the subspace method's block Hankel matrices (0 for the dead-time fits).

    Returns
    -------
    int
        ``IDENTIFY_SAMPLE_BYTES samples columns`` plus, for the subspace method, eight copies of the
        ``2 k columns x samples`` block Hankel matrix (the data matrix, its QR factors and the
        projections), plus :data:`BASE_BYTES`.
    """
    subspace = 8 * 8 * (2 * block_rows * columns) * samples if block_rows else 0
    return IDENTIFY_SAMPLE_BYTES * samples * (columns + outputs) + subspace + BASE_BYTES
