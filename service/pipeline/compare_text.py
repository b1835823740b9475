"""The words of POST /design/compare: summary sentences and the Markdown for a change request.

Both are written from the :class:`~service.schemas.compare.CompareResponse` alone, so the
Markdown says nothing the JSON does not.  Numbers are shown with three significant digits;
the JSON carries them in full.
"""

from __future__ import annotations

from service.schemas.compare import CompareResponse, DominantPoleReport, LoopRobustnessChange, SideReport
from service.schemas.design import ADVISORY

__all__ = ["HIGH_PEAK_SENSITIVITY", "compare_markdown", "summary"]

#: Peak sensitivity above which the summary calls a loop's robustness low (6 dB, the
#: threshold of /design's high_peak_sensitivity warning; common practice).
HIGH_PEAK_SENSITIVITY = 2.0

_GAIN_SYMBOL = {"setpoint": "Kr", "state": "Kx", "previous_input": "Ku", "disturbance": "Kd"}


def _g(value: float | None) -> str:
    return "none" if value is None else f"{value:.3g}"


def _direction(before: float, after: float, up: str = "rises", down: str = "falls") -> str:
    return up if after > before else down if after < before else "stays"


def _speed_sentences(answer: CompareResponse) -> list[str]:
    out = []
    for f in answer.scenario.outputs:
        if f.zone:
            out.append(
                f"{f.name} is a zone output: it has no setpoint to settle at (the move QP of /simulate holds it "
                f"in its zone), so the scenario gives it no settling figures."
            )
            continue
        (s0, s1), (o0, o1) = f.settling_time, f.overshoot_percent
        if s0 is not None and s1 is not None and f.settling_change_percent is not None:
            change = f.settling_change_percent
            if abs(change) < 0.5:
                text = f"{f.name} settles as fast as before (settling time {_g(s0)})"
            else:
                word = "faster" if change < 0 else "slower"
                text = f"{f.name} settles {abs(change):.0f} % {word} (settling time {_g(s0)} -> {_g(s1)})"
        elif s0 is not None and s1 is None:
            text = f"{f.name} no longer settles within the scenario with the proposed design (it did in {_g(s0)})"
        elif s0 is None and s1 is not None:
            text = f"{f.name} now settles within the scenario (settling time {_g(s1)}); it did not before"
        else:
            text = f"{f.name} settles within the scenario with neither design"
        if o0 is not None and o1 is not None and abs(o1 - o0) >= 1.0:
            text += f"; its overshoot {_direction(o0, o1)} from {o0:.0f} % to {o1:.0f} %"
        out.append(text + ".")
    return out


def _output_side(answer: CompareResponse) -> str:
    """Where the output loop is broken: "plant output", named by its tags when those are sensors."""
    assert answer.robustness is not None
    sides = answer.robustness.plant_output_signals
    outputs = [s.name for s in answer.in_service_design.plant.outputs]
    if all(side == outputs for side in sides):
        return "plant output"
    if sides[0] == sides[1]:
        return f"plant output (at {', '.join(sides[0])})"
    return f"plant output (at {', '.join(sides[0])} in service, {', '.join(sides[1])} proposed)"


def _robustness_sentences(answer: CompareResponse) -> list[str]:
    if answer.robustness is None:
        return []
    out = []
    loops: list[tuple[str, LoopRobustnessChange]] = [
        ("plant input", answer.robustness.plant_input),
        (_output_side(answer), answer.robustness.plant_output),
    ]
    for where, loop in loops:
        a, b = loop.peak_sensitivity
        text = f"The peak sensitivity at the {where} {_direction(a, b)} from {_g(a)} to {_g(b)}"
        if b > HIGH_PEAK_SENSITIVITY >= a:
            text += f" (above {HIGH_PEAK_SENSITIVITY:g}: less robust to model error)"
        out.append(text + ".")
    return out


_STABLE_CELL = {"stable": "yes", "marginal": "no (marginal)", "unstable": "NO (unstable)"}


def _verdict(side: SideReport) -> str:
    """``"stable"``, ``"marginal"`` (not stable, no pole outside the circle) or ``"unstable"``, as /design says it.

    /design's ``closed_loop.stable`` is false for both of the last two; only a pole outside the
    circle (beyond its tolerance) brings the ``unstable_closed_loop`` warning.
    """
    if side.stable:
        return "stable"
    return "unstable" if "unstable_closed_loop" in side.warnings else "marginal"


def summary(answer: CompareResponse, *, same_model: bool) -> list[str]:
    """Plain-language sentences for the change record, most important first."""
    before, after = answer.in_service, answer.proposed
    out: list[str] = []
    if before.fingerprint == after.fingerprint:
        out.append("The two requests are the same design (equal fingerprints): nothing changes.")
    verdicts = _verdict(before), _verdict(after)
    if verdicts[1] == "unstable":
        out.append("The proposed design's closed loop is UNSTABLE: do not put it in service.")
    elif verdicts[1] == "marginal":
        also = " (as is the one in service)" if verdicts[0] == "marginal" else ""
        out.append(
            f"The proposed design's closed loop is marginal{also}, not unstable: a pole sits on the unit circle "
            "(its warnings name the cause and the fix; /design lists it under closed_loop.marginal_modes), "
            "so the loop does not settle along that mode"
            + (" (the one in service is stable)." if verdicts[0] == "stable" else ".")
        )
    elif verdicts[0] != "stable":
        out.append(f"The proposed design's closed loop is stable; the one in service is {verdicts[0]}.")
    if any(answer.scenario.diverged):
        which = " and ".join(n for n, d in zip(("in service", "proposed"), answer.scenario.diverged, strict=True) if d)
        out.append(f"The scenario run blew up with the design {which}.")
    out += _speed_sentences(answer)
    out += _robustness_sentences(answer)
    if "large_relative_gains" in after.warnings and answer.scenario.scenario.true_plant is None:
        out.append(
            "The plant has large relative gains (warning large_relative_gains): these figures are for the model "
            "itself, and the tighter a tuning decouples the outputs, the more a gain error on each input of its "
            "own degrades it. Compare with a scenario whose true_plant has its input gains 20 % apart in "
            "opposite directions before choosing the faster design."
        )
    p0, p1 = before.dominant_pole, after.dominant_pole
    what = "The dominant closed-loop pole"
    if (
        before.settling_pole is not None
        and after.settling_pole is not None
        and (before.settling_pole != p0 or after.settling_pole != p1)
    ):
        # a pole held on the unit circle by a named cause (a zone output's integrator) does not
        # move with the tuning: the mode the loop settles by is the largest of the others
        p0, p1 = before.settling_pole, after.settling_pole
        what = "The dominant closed-loop pole off the unit circle (the poles on it are named in the warnings)"
    text = f"{what} moves from modulus {p0.modulus:.4g} to {p1.modulus:.4g}"
    if p0.time_constant is not None and p1.time_constant is not None:
        text += f" (time constant {_g(p0.time_constant)} -> {_g(p1.time_constant)})"
    out.append(text + ".")
    c0, c1 = before.hessian_condition_number, after.hessian_condition_number
    out.append(f"The Hessian's condition number {_direction(c0, c1)} from {c0:.3g} to {c1:.3g}.")
    matched = [c for c in answer.gain_changes if c.change is not None]
    if matched and matched[0].change:
        c = matched[0]
        relative = "" if c.relative_change is None else f" ({100 * c.relative_change:+.0f} %)"
        # ranked by the change between signals divided by their sizes; say so when a size made a difference
        scaled = any(g.scaled_change != g.change for g in matched)
        out.append(
            f"The largest gain change{' (signals divided by their spans or natural sizes)' if scaled else ''} is "
            f"{_GAIN_SYMBOL[c.gain]}[{c.row}, {c.column}]: {_g(c.in_service)} -> {_g(c.proposed)}{relative}."
        )
    if not same_model:
        out.append(
            "The models differ: the state gains Kx need not act on states of the same meaning; judge the change "
            "by the setpoint gains, the poles and the scenario."
        )
    new = [w for w in after.warnings if w not in before.warnings]
    if new:
        out.append(f"New warnings with the proposed design: {', '.join(new)}.")
    return out


def _modulus(pole: DominantPoleReport | None) -> str:
    return "none" if pole is None else f"{pole.modulus:.4g}"


def _time_constant(pole: DominantPoleReport | None) -> str:
    return "none" if pole is None else _g(pole.time_constant)


def _row(*cells: object) -> str:
    return "| " + " | ".join(str(c).replace("|", "\\|") for c in cells) + " |"


def compare_markdown(answer: CompareResponse, *, largest: int = 20) -> str:
    """The comparison as Markdown for a change request, with the caution and a sign-off block."""
    b, a = answer.in_service, answer.proposed
    lines = [
        "# Change review: predictive controller design",
        "",
        f"> **Caution.** {ADVISORY}",
        "",
        f"- Design in service: `{b.fingerprint}`",
        f"- Proposed design: `{a.fingerprint}`",
        "",
        "## Summary",
        "",
        *[f"- {s}" for s in answer.summary],
        "",
        "## Closed loop and conditioning",
        "",
        _row("", "in service", "proposed"),
        _row("---", "---", "---"),
        _row("stable", *(_STABLE_CELL[_verdict(side)] for side in (b, a))),
        _row("dominant pole modulus", f"{b.dominant_pole.modulus:.4g}", f"{a.dominant_pole.modulus:.4g}"),
        _row("dominant time constant", _g(b.dominant_pole.time_constant), _g(a.dominant_pole.time_constant)),
        *(
            [
                _row("dominant pole off the circle", *(_modulus(side.settling_pole) for side in (b, a))),
                _row("its time constant", *(_time_constant(side.settling_pole) for side in (b, a))),
            ]
            if any(side.settling_pole != side.dominant_pole for side in (b, a))
            else []
        ),
        _row("Hessian condition number", f"{b.hessian_condition_number:.3g}", f"{a.hessian_condition_number:.3g}"),
        _row("warnings", ", ".join(b.warnings) or "none", ", ".join(a.warnings) or "none"),
    ]
    if answer.robustness is not None:
        lines += [
            "",
            "## Robustness (scaled signals)",
            "",
            _row("", "in service", "proposed"),
            _row("---", "---", "---"),
        ]
        for where, loop in (
            ("plant input", answer.robustness.plant_input),
            (_output_side(answer), answer.robustness.plant_output),
        ):
            lines.append(_row(f"peak sensitivity at the {where}", *map(_g, loop.peak_sensitivity)))
            lines.append(_row(f"peak complementary sensitivity at the {where}", *map(_g, loop.peak_complementary)))
            if any(v is not None for v in loop.gain_margin):
                lines.append(_row(f"gain margin at the {where}", *map(_g, loop.gain_margin)))
                lines.append(_row(f"phase margin at the {where} (deg)", *map(_g, loop.phase_margin)))
    kind = "the default setpoint steps" if answer.scenario.default else "the caller's scenario"
    lines += [
        "",
        f"## Figures of merit ({kind})",
        "",
        _row("output", "rise time", "settling time", "overshoot %", "IAE", "settling change"),
        _row("---", "---", "---", "---", "---", "---"),
    ]
    for f in answer.scenario.outputs:
        if f.zone:
            lines.append(_row(f"{f.name} (zone output: no setpoint to settle at)", "", "", "", "", ""))
            continue
        change = "" if f.settling_change_percent is None else f"{f.settling_change_percent:+.0f} %"
        lines.append(
            _row(
                f.name,
                " -> ".join(map(_g, f.rise_time)),
                " -> ".join(map(_g, f.settling_time)),
                " -> ".join(map(_g, f.overshoot_percent)),
                " -> ".join(map(_g, f.integral_absolute_error)),
                change,
            )
        )
    shown = answer.gain_changes[:largest]
    lines += [
        "",
        f"## Largest gain changes ({len(shown)} of {len(answer.gain_changes)}; all in the JSON answer)",
        "",
        "Ranked by the scaled change: the change between the signals divided by their spans (span 1 for a",
        "tag without one and for a state).",
        "",
        _row("gain", "manipulated", "column", "in service", "proposed", "change", "relative", "scaled change"),
        _row("---", "---", "---", "---", "---", "---", "---", "---"),
    ]
    for c in shown:
        relative = "" if c.relative_change is None else f"{100 * c.relative_change:+.1f} %"
        lines.append(
            _row(
                _GAIN_SYMBOL[c.gain],
                c.row,
                c.column,
                _g(c.in_service),
                _g(c.proposed),
                _g(c.change),
                relative,
                _g(c.scaled_change),
            )
        )
    lines += [
        "",
        "## Review and sign-off",
        "",
        "The proposed design may go into service only after this review, simulation and testing",
        "under the site's management-of-change procedure.",
        "",
        "- Reviewer (name, role): ______________________",
        "- Date: ______________",
        "- Decision: [ ] approved  [ ] approved with conditions  [ ] rejected",
        "- Conditions and remarks: ______________________",
        "- Signature: ______________________",
        "",
    ]
    return "\n".join(lines)
