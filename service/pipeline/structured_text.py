"""The fixed law as an IEC 61131-3 Structured Text function block (the open standard's text language).

The block holds the law of :mod:`service.solver.estimation.fixed_law` in its split form,
written out as scalar difference equations (no arrays, no loops, no vendor pragmas: only
declarations, assignments and IF statements of the standard).  Per call, once every
sample time:

1. each measurement whose quality input is FALSE is replaced by the estimator's
   prediction ``y(k|k-1)`` of it (``held`` is set);
2. the law gives the inputs ``u = Cu s + Du w``;
3. each input is clamped, first to its largest move from the last applied input
   (``move_max``), then into ``[input_min, input_max]`` (``clamped`` is set);
4. the outputs are the clamped inputs and their moves;
5. the state is updated with the applied inputs: ``s := Ap s + Bp w + Bu u``.

With an operating point the block's signals are absolute (engineering units) and its state
stays in deviations: the operating point is declared as constants (``<tag>_op``; a sensor of
its own has its own constant, ``operating_point.measured``, beside the controlled output's
for its setpoint), each measurement, setpoint, measured disturbance and input target has its operating point
subtracted before the law, the law's inputs have theirs added (``u = u_dev + u0``), the clamp
works on the absolute inputs against absolute limits (the previous input is ``s_prev + u0``),
and the state takes the applied input's deviation ``u - u0``
(:mod:`service.pipeline.export`, the affine law).

Numbers are written with 17 significant digits (``LREAL``, IEEE double), so the block
reproduces the law to rounding.  Tags become identifiers (letters, digits and single
underscores, case-insensitive and unique, no keyword); the header lists each identifier
with its tag.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.schemas.design import ADVISORY
from service.schemas.export import LawSignal
from service.solver.estimation.fixed_law import FixedLaw

__all__ = ["KEYWORDS", "BlockText", "st_identifier", "structured_text"]

#: Words an identifier must not be: the standard's keywords and elementary type names
#: (IEC 61131-3, recalled from memory; a generous list, compared case-insensitively).
KEYWORDS = frozenset(
    """ABS ACOS ACTION AND ANY ARRAY ASIN AT ATAN BOOL BY BYTE CASE CLASS CONFIGURATION CONSTANT COS DATE
    DATE_AND_TIME DINT DO DT DWORD ELSE ELSIF END_ACTION END_CASE END_CLASS END_CONFIGURATION END_FOR
    END_FUNCTION END_FUNCTION_BLOCK END_IF END_INTERFACE END_METHOD END_PROGRAM END_REPEAT END_RESOURCE
    END_STEP END_STRUCT END_TRANSITION END_TYPE END_VAR END_WHILE EXIT EXP EXTENDS F_EDGE FALSE FOR FROM
    FUNCTION FUNCTION_BLOCK IF IMPLEMENTS INITIAL_STEP INT INTERFACE INTERNAL LINT LN LOG LREAL LWORD
    METHOD MOD NOT OF ON OR OVERRIDE PRIVATE PROGRAM PROTECTED PUBLIC R_EDGE READ_ONLY READ_WRITE REAL
    REF_TO REPEAT RESOURCE RETAIN RETURN SINT SIN SQRT STEP STRING STRUCT SUPER TAN TASK THEN THIS TIME
    TIME_OF_DAY TO TOD TRANSITION TRUE TYPE UDINT UINT ULINT UNTIL USINT VAR VAR_ACCESS VAR_CONFIG
    VAR_EXTERNAL VAR_GLOBAL VAR_INPUT VAR_IN_OUT VAR_OUTPUT VAR_TEMP WHILE WITH WORD WSTRING XOR""".split()  # noqa: SIM905
)

_TERMS_PER_LINE = 3


def st_identifier(text: str) -> str:
    """An IEC 61131-3 identifier made from a tag: other characters become single underscores."""
    name = re.sub(r"[^A-Za-z0-9]+", "_", text).strip("_")
    if not name:
        name = "signal"
    if name[0].isdigit():
        name = "t_" + name
    if name.upper() in KEYWORDS:
        name += "_tag"
    return name


class _Names:
    """Identifiers handed out once each, unique without regard to case."""

    def __init__(self) -> None:
        self.used: set[str] = set()

    def take(self, wanted: str) -> str:
        name, count = wanted, 1
        while name.upper() in self.used:
            count += 1
            name = f"{wanted}_{count}"
        self.used.add(name.upper())
        return name


def _comment(text: str) -> str:
    """Text safe inside ``(* ... *)``: ASCII, with no comment delimiters in it."""
    safe = text.encode("ascii", "replace").decode("ascii")
    return safe.replace("(*", "( *").replace("*)", "* )")


def _literal(value: float) -> str:
    """An LREAL literal with 17 significant digits (digits on both sides of the point)."""
    return f"{value:.16E}"


def _sum(terms: list[tuple[float, str]]) -> str:
    parts: list[str] = []
    for value, name in terms:
        if value == 0.0:
            continue
        magnitude = f"{_literal(abs(float(value)))} * {name}"
        if not parts:
            parts.append(f"-{magnitude}" if value < 0 else magnitude)
        else:
            parts.append(f"{'-' if value < 0 else '+'} {magnitude}")
    if not parts:
        return "0.0"
    lines = [" ".join(parts[i : i + _TERMS_PER_LINE]) for i in range(0, len(parts), _TERMS_PER_LINE)]
    return "\n        ".join(lines)


@dataclass(frozen=True)
class BlockText:
    """What the block is about, for its header."""

    block_name: str
    fingerprint: str
    generated: str
    sample_time: float
    estimator: str
    #: The design's warnings (code, message), as /design answers them, written into the header.
    warnings: tuple[tuple[str, str], ...] = ()


def _wrap(text: str, width: int = 92, indent: str = "   ") -> list[str]:
    words, lines, line = text.split(), [], ""
    for word in words:
        if line and len(line) + 1 + len(word) > width:
            lines.append(indent + line)
            line = word
        else:
            line = f"{line} {word}" if line else word
    if line:
        lines.append(indent + line)
    return lines


def structured_text(
    law: FixedLaw,
    *,
    inputs: list[LawSignal],
    outputs: list[LawSignal],
    states: list[str],
    about: BlockText,
    input_min: NDArray[np.float64] | None = None,
    input_max: NDArray[np.float64] | None = None,
    move_max: NDArray[np.float64] | None = None,
    input_offset: NDArray[np.float64] | None = None,
    output_offset: NDArray[np.float64] | None = None,
) -> str:
    """Write the law as a FUNCTION_BLOCK (module notes).

    Parameters
    ----------
    law : FixedLaw
        In engineering units.
    inputs, outputs, states : list
        The law's labels (:func:`service.pipeline.export.law_labels`).
    about : BlockText
    input_min, input_max, move_max : ndarray, shape (m,), optional
        The clamp of each manipulated variable (infinite where absent), absolute with an
        operating point.
    input_offset : ndarray, shape (nw,), optional
        ``w0``, the operating point of each law input (:func:`service.pipeline.export.law_offsets`);
        with ``output_offset`` the block works in absolute signals (module notes).
    output_offset : ndarray, shape (m,), optional
        ``u0``, the operating point of each manipulated variable.

    Returns
    -------
    str
        The block's source text, LF line ends.
    """
    m, p, pz, na = law.inputs, law.measured, law.setpoints, law.estimates
    ns = na + m
    inf = np.full(m, np.inf)
    lo = -inf if input_min is None else np.asarray(input_min, dtype=float)
    hi = inf if input_max is None else np.asarray(input_max, dtype=float)
    dmax = inf if move_max is None else np.asarray(move_max, dtype=float)

    names = _Names()
    for reserved in (about.block_name, "reset", "held", "clamped"):
        names.take(reserved)
    s = [names.take(f"s_{i + 1}") for i in range(ns)]
    nxt = [names.take(f"n_{i + 1}") for i in range(ns)]
    y = [names.take(f"y_{i + 1}") for i in range(p)]
    u = [names.take(f"u_{j + 1}") for j in range(m)]
    measured = [names.take(st_identifier(sig.tag)) for sig in inputs[:p]]
    quality = [names.take(f"{name}_ok") for name in measured]
    setpoint = [names.take(f"{st_identifier(sig.tag)}_sp") for sig in inputs[p : p + pz]]
    md = law.disturbances
    disturbance = [names.take(st_identifier(sig.tag)) for sig in inputs[p + pz : p + pz + md]]
    target = [names.take(f"{st_identifier(sig.tag)}_target") for sig in inputs[p + pz + md :]]
    manipulated = [names.take(st_identifier(sig.tag)) for sig in outputs[:m]]
    move = [names.take(f"{name}_move") for name in manipulated]
    low = {j: names.take(f"{manipulated[j]}_min") for j in range(m) if np.isfinite(lo[j])}
    high = {j: names.take(f"{manipulated[j]}_max") for j in range(m) if np.isfinite(hi[j])}
    step = {j: names.take(f"{manipulated[j]}_move_max") for j in range(m) if np.isfinite(dmax[j])}
    absolute = input_offset is not None and output_offset is not None
    w0 = np.zeros(p + pz + md + len(target)) if input_offset is None else np.asarray(input_offset, dtype=float)
    u0 = np.zeros(m) if output_offset is None else np.asarray(output_offset, dtype=float)
    if absolute:  # operating-point constants and the deviations the law reads
        # the measurements' operating points (w0[:p]), then the setpoints' (w0[p:p+pz]): the same
        # constants when the measured outputs are the controlled ones
        op_out = [names.take(f"{name}_op") for name in measured]
        shared = (
            p == pz
            and np.array_equal(w0[:p], w0[p : p + pz])
            and [sig.tag for sig in inputs[:p]] == [sig.tag for sig in inputs[p : p + pz]]
        )
        op_sp = op_out if shared else [names.take(f"{st_identifier(sig.tag)}_op") for sig in inputs[p : p + pz]]
        op_dist = [names.take(f"{name}_op") for name in disturbance]
        op_in = [names.take(f"{name}_op") for name in manipulated]
        r_dev = [names.take(f"r_{i + 1}") for i in range(pz)]
        d_dev = [names.take(f"d_{i + 1}") for i in range(md)]
        t_dev = [names.take(f"t_{j + 1}") for j in range(len(target))]
        last = [names.take(f"p_{j + 1}") for j in range(m)]
        applied = [names.take(f"v_{j + 1}") for j in range(m)]
        signal = [*y, *r_dev, *d_dev, *t_dev]
    else:
        op_out, op_sp, op_dist, op_in, r_dev, d_dev, t_dev, last, applied = [], [], [], [], [], [], [], [], []
        signal = [*y, *setpoint, *disturbance, *target]

    def unit(sig: LawSignal) -> str:
        return f" [{sig.unit}]" if sig.unit else ""

    head = [
        "(*",
        f"   {about.block_name}: a predictive control law as an IEC 61131-3 function block.",
        "",
        "   CAUTION: generated code, a design aid. It must be reviewed and tested before use.",
        *_wrap(ADVISORY),
        "",
        f"   Design fingerprint: {about.fingerprint}",
        f"   Generated: {about.generated} (UTC)",
        f"   Sample time: call the block exactly once every {about.sample_time!r} (the model's time unit), at",
        "   a fixed period; the law is valid only at that period.",
        f"   Law: the unconstrained predictive controller with its estimator ({_comment(about.estimator)}),",
        f"   {ns} states kept between calls. The state starts at zero: the plant at rest where the model's",
        "   signals are zero (signals are the model's own: deviations when the model is written in",
        "   deviations). reset := TRUE restarts from there.",
        *(
            [
                "   Operating point: the signals are absolute (engineering units). The constants <name>_op are",
                "   the operating point; the block subtracts them from its inputs, adds them to the manipulated",
                "   variables and keeps its state in deviations (zero: at rest at the operating point).",
            ]
            if absolute
            else []
        ),
        *(
            [
                "",
                "   Design warnings (as /design answers them for this request; resolve each before use):",
                *(
                    line
                    for code, message in about.warnings
                    for line in _wrap(f"- {_comment(code)}: {_comment(message)}", indent="     ")
                ),
            ]
            if about.warnings
            else []
        ),
        "",
        "   Signals (identifier = tag [unit]):",
    ]
    for name, sig in zip(measured, inputs[:p], strict=True):
        head.append(f"     {name} = measured {_comment(sig.tag)}{_comment(unit(sig))}")
    for name, sig in zip(setpoint, inputs[p : p + pz], strict=True):
        head.append(f"     {name} = setpoint of {_comment(sig.tag)}{_comment(unit(sig))}")
    for name, sig in zip(disturbance, inputs[p + pz : p + pz + md], strict=True):
        head.append(f"     {name} = measured disturbance {_comment(sig.tag)}{_comment(unit(sig))}")
    for name, sig in zip(target, inputs[p + pz + md :], strict=True):
        head.append(f"     {name} = input target of {_comment(sig.tag)}{_comment(unit(sig))}")
    for name, sig in zip(manipulated, outputs[:m], strict=True):
        head.append(f"     {name} = manipulated variable {_comment(sig.tag)}{_comment(unit(sig))}")
    head += [
        "",
        "   Clamping: each manipulated variable is clamped first to its largest move from the last",
        "   applied value (<name>_move_max), then into [<name>_min, <name>_max]; the level limits win.",
        "   clamped is TRUE on a call that clamped. The block keeps the applied (clamped) value as its",
        "   previous input and feeds it to its estimator, so the estimate follows what the plant",
        "   received. The clamp is not the constrained optimum a move QP under the same limits finds.",
        "   Limits come from the design request; a signal without a limit is not clamped.",
        "",
        "   Bad measurements: set <name>_ok := FALSE while a measurement is bad. The block then uses its",
        "   estimator's prediction of that measurement instead (the innovation of that output is zero",
        "   and the estimate runs on the model), and sets held. While held, that output is not fed",
        "   back: model error accumulates unseen, so put the loop in manual after a few sample times.",
        "",
        *_wrap("State: " + ", ".join(f"{s[i]} = {_comment(states[i])}" for i in range(ns))),
        "*)",
    ]

    decl = [f"FUNCTION_BLOCK {about.block_name}", "VAR_INPUT"]
    for name, ok, sig in zip(measured, quality, inputs[:p], strict=True):
        decl.append(f"    {name} : LREAL; (* measured {_comment(sig.tag)}{_comment(unit(sig))} *)")
        decl.append(f"    {ok} : BOOL := TRUE; (* FALSE while {name} is bad *)")
    for name, sig in zip(setpoint, inputs[p : p + pz], strict=True):
        decl.append(f"    {name} : LREAL; (* setpoint of {_comment(sig.tag)}{_comment(unit(sig))} *)")
    for name, sig in zip(disturbance, inputs[p + pz : p + pz + md], strict=True):
        decl.append(f"    {name} : LREAL; (* measured disturbance {_comment(sig.tag)}{_comment(unit(sig))} *)")
    for name, sig in zip(target, inputs[p + pz + md :], strict=True):
        decl.append(f"    {name} : LREAL; (* input target of {_comment(sig.tag)}{_comment(unit(sig))} *)")
    decl += ["    reset : BOOL := FALSE; (* TRUE: every state back to zero before this call *)", "END_VAR"]
    decl.append("VAR_OUTPUT")
    for name, mv, sig in zip(manipulated, move, outputs[:m], strict=True):
        decl.append(f"    {name} : LREAL; (* manipulated variable {_comment(sig.tag)}{_comment(unit(sig))} *)")
        decl.append(f"    {mv} : LREAL; (* its move since the last call *)")
    decl += [
        "    held : BOOL; (* a measurement was bad on this call *)",
        "    clamped : BOOL; (* an output was clamped on this call *)",
        "END_VAR",
        "VAR",
    ]
    for i in range(ns):
        decl.append(f"    {s[i]} : LREAL := 0.0; (* {_comment(states[i])} *)")
    decl += [f"    {name} : LREAL;" for name in (*nxt, *y, *u, *r_dev, *d_dev, *t_dev, *last, *applied)]
    decl.append("END_VAR")
    if low or high or step or absolute:
        decl.append("VAR CONSTANT")
        for i, name in enumerate(op_out):
            decl.append(f"    {name} : LREAL := {_literal(float(w0[i]))}; (* operating point of {measured[i]} *)")
        if op_sp is not op_out:
            for i, name in enumerate(op_sp):
                value = float(w0[p + i])
                decl.append(f"    {name} : LREAL := {_literal(value)}; (* operating point of {setpoint[i]} *)")
        for k, name in enumerate(op_dist):
            value = float(w0[p + pz + k])
            decl.append(f"    {name} : LREAL := {_literal(value)}; (* operating point of {disturbance[k]} *)")
        for j, name in enumerate(op_in):
            decl.append(f"    {name} : LREAL := {_literal(float(u0[j]))}; (* operating point of {manipulated[j]} *)")
        for j, name in step.items():
            decl.append(f"    {name} : LREAL := {_literal(float(dmax[j]))};")
        for j, name in low.items():
            decl.append(f"    {name} : LREAL := {_literal(float(lo[j]))};")
        for j, name in high.items():
            decl.append(f"    {name} : LREAL := {_literal(float(hi[j]))};")
        decl.append("END_VAR")

    body = ["", "IF reset THEN"]
    body += [f"    {name} := 0.0;" for name in s]
    body += ["END_IF;", "held := FALSE;", "clamped := FALSE;", "", "(* 1. measurements; a bad one is predicted *)"]
    for i in range(p):
        body += [
            f"IF {quality[i]} THEN",
            f"    {y[i]} := {measured[i]} - {op_out[i]};" if absolute else f"    {y[i]} := {measured[i]};",
            "ELSE",
            f"    {y[i]} := {_sum(list(zip(law.prediction[i], s, strict=True)))};",
            "    held := TRUE;",
            "END_IF;",
        ]
    if absolute:
        body.append("(* deviations from the operating point *)")
        body += [f"{r_dev[i]} := {setpoint[i]} - {op_sp[i]};" for i in range(pz)]
        body += [f"{d_dev[k]} := {disturbance[k]} - {op_dist[k]};" for k in range(md)]
        body += [f"{t_dev[j]} := {target[j]} - {op_in[j]};" for j in range(len(target))]
        body += [f"{last[j]} := {s[na + j]} + {op_in[j]};" for j in range(m)]
    body.append("(* 2. the law *)")
    for j in range(m):
        terms = [*zip(law.input_state[j], s, strict=True), *zip(law.input_direct[j], signal, strict=True)]
        body.append(f"{u[j]} := {_sum(terms)} + {op_in[j]};" if absolute else f"{u[j]} := {_sum(terms)};")
    body.append("(* 3. clamping: the move, then the level *)")
    previous = last if absolute else s[na:]
    for j in range(m):
        if j in step:
            body += [
                f"IF {u[j]} > {previous[j]} + {step[j]} THEN",
                f"    {u[j]} := {previous[j]} + {step[j]};",
                "    clamped := TRUE;",
                f"ELSIF {u[j]} < {previous[j]} - {step[j]} THEN",
                f"    {u[j]} := {previous[j]} - {step[j]};",
                "    clamped := TRUE;",
                "END_IF;",
            ]
        if j in high:
            body += [f"IF {u[j]} > {high[j]} THEN", f"    {u[j]} := {high[j]};", "    clamped := TRUE;", "END_IF;"]
        if j in low:
            body += [f"IF {u[j]} < {low[j]} THEN", f"    {u[j]} := {low[j]};", "    clamped := TRUE;", "END_IF;"]
    body.append("(* 4. outputs *)")
    for j in range(m):
        body += [f"{manipulated[j]} := {u[j]};", f"{move[j]} := {u[j]} - {previous[j]};"]
    body.append("(* 5. the state, with the inputs applied *)")
    if absolute:
        body += [f"{applied[j]} := {u[j]} - {op_in[j]};" for j in range(m)]
    for i in range(ns):
        terms = [
            *zip(law.state_update[i], s, strict=True),
            *zip(law.signal_update[i], signal, strict=True),
            *zip(law.applied_update[i], applied if absolute else u, strict=True),
        ]
        body.append(f"{nxt[i]} := {_sum(terms)};")
    body += [f"{s[i]} := {nxt[i]};" for i in range(ns)]
    body += ["", "END_FUNCTION_BLOCK", ""]
    return "\n".join([*head, *decl, *body])
