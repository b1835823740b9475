// Charts of the workbench, drawn by plotly.js (served from the installed plotly package).
// Colours: the Okabe-Ito palette; every series also differs by dash or marker shape.

import { fmt } from "./tables.js";

export const COLOURS = {
  blue: "#0072B2",
  orange: "#E69F00",
  sky: "#56B4E9",
  green: "#009E73",
  yellow: "#F0E442",
  vermillion: "#D55E00",
  purple: "#CC79A7",
  black: "#000000",
  grey: "#8c8c8c",
};

const FONT = { family: "system-ui, sans-serif", size: 12, color: "#1b1b1b" };

function baseLayout(title, extra = {}) {
  return {
    title: { text: title, font: { size: 14 }, x: 0.02, xanchor: "left" },
    font: FONT,
    margin: { l: 64, r: 16, t: 40, b: 90 },
    paper_bgcolor: "#ffffff",
    plot_bgcolor: "#ffffff",
    legend: { orientation: "h", yref: "container", y: 0, yanchor: "bottom", x: 0, font: { size: 11 } },
    hovermode: "closest",
    ...extra,
  };
}

function config(filename) {
  return {
    responsive: true,
    displaylogo: false,
    // no "share" button: it would upload the chart (tags, trajectories) to the charting library's
    // cloud service, off the plant network; the page talks to the service alone
    showSendToCloud: false,
    showEditInChartStudio: false,
    plotlyServerURL: "",
    modeBarButtonsToRemove: ["select2d", "lasso2d"],
    toImageButtonOptions: { format: "png", filename, scale: 2 },
  };
}

/**
 * Fit every chart of a grid to its cell once the grid holds them all: a chart is drawn when
 * its box is added, while the grid still has fewer items (the first one alone spans the whole
 * row), and plotly keeps that width until the window itself is resized.
 */
function fitToCells(drawn) {
  for (const div of drawn) window.Plotly.Plots.resize(div);
  return drawn;
}

/** A chart in a figure with its caption and a save-as-PNG button; returns the chart div. */
export function chartBox(container, { id, testid, label, filename, square = false }) {
  const figure = document.createElement("figure");
  figure.className = "chart-box";
  const div = document.createElement("div");
  div.className = square ? "chart square" : "chart";
  div.id = id;
  if (testid) div.dataset.testid = testid;
  div.setAttribute("role", "img");
  div.setAttribute("aria-label", label);
  div.dataset.filename = filename;
  const caption = document.createElement("figcaption");
  const text = document.createElement("span");
  text.textContent = label;
  const save = document.createElement("button");
  save.type = "button";
  save.className = "save-image";
  save.dataset.chart = id;
  save.textContent = "Save as PNG";
  save.setAttribute("aria-label", `Save the chart “${label}” as PNG`);
  caption.append(text, save);
  figure.append(div, caption);
  container.append(figure);
  return div;
}

export function saveImage(div) {
  return window.Plotly.downloadImage(div, { format: "png", filename: div.dataset.filename || div.id, scale: 2 });
}

const column = (rows, j) => rows.map((row) => (row ? row[j] : null));
const modulus = (p) => Math.hypot(p.real, p.imag);

function poleTrace(name, poles, symbol, colour, size = 11) {
  return {
    type: "scatter",
    mode: "markers",
    name: `${name} (${poles.length})`,
    x: poles.map((p) => p.real),
    y: poles.map((p) => p.imag),
    customdata: poles.map((p) => [modulus(p), (Math.atan2(p.imag, p.real) * 180) / Math.PI]),
    marker: { symbol, size, color: colour, line: { width: 2, color: colour } },
    hovertemplate: `${name}<br>%{x:.5f} %{y:+.5f}i<br>modulus %{customdata[0]:.6f}<br>angle %{customdata[1]:.2f}°<extra></extra>`,
  };
}

/**
 * The pole map: the unit circle, the closed-loop, open-loop and estimator poles, and the
 * marginal modes (poles on the unit circle, or those the answer lists as marginal).
 */
export function drawPoleMap(div, { closed = [], open = [], estimator = [], marginal = [], truth = [] }) {
  const circle = Array.from({ length: 361 }, (_, k) => (k * Math.PI) / 180);
  const traces = [
    {
      type: "scatter", mode: "lines", name: "unit circle", x: circle.map(Math.cos), y: circle.map(Math.sin),
      line: { color: COLOURS.grey, width: 1 }, hoverinfo: "skip",
    },
  ];
  if (open.length) traces.push(poleTrace("open-loop pole", open, "circle-open", COLOURS.vermillion));
  if (estimator.length) traces.push(poleTrace("estimator pole", estimator, "diamond-open", COLOURS.green));
  if (closed.length) traces.push(poleTrace("closed-loop pole", closed, "x-thin", COLOURS.blue, 12));
  if (truth.length) traces.push(poleTrace("pole on the true plant", truth, "triangle-up-open", COLOURS.orange, 10));
  if (marginal.length) traces.push(poleTrace("marginal mode", marginal, "square-open", COLOURS.purple, 18));
  let reach = 1.1;
  for (const p of [...closed, ...open, ...estimator, ...truth]) reach = Math.max(reach, 1.05 * Math.abs(p.real), 1.05 * Math.abs(p.imag));
  const layout = baseLayout("Poles in the z-plane", {
    xaxis: { title: { text: "real part" }, range: [-reach, reach], zeroline: true, zerolinecolor: "#d0d0d0" },
    yaxis: { title: { text: "imaginary part" }, range: [-reach, reach], scaleanchor: "x", scaleratio: 1, zeroline: true, zerolinecolor: "#d0d0d0" },
    margin: { l: 56, r: 16, t: 40, b: 96 },
  });
  // Fitted to its box once drawn: a window resize while its section was hidden (after a failed
  // request) leaves plotly's width stale, and react alone keeps it.
  return window.Plotly.react(div, traces, layout, config(div.dataset.filename || "poles")).then(() => window.Plotly.Plots.resize(div));
}

function pick(object, ...names) {
  for (const name of names) if (object && object[name] !== undefined && object[name] !== null) return object[name];
  return undefined;
}

function at(vector, j) {
  if (vector === undefined || vector === null) return null;
  if (typeof vector === "number") return vector;
  const v = vector[j];
  return typeof v === "number" && Number.isFinite(v) ? v : null;
}

function level(name, time, value, colour, dash, group) {
  return {
    type: "scatter", mode: "lines", name, x: [time[0], time[time.length - 1]], y: [value, value],
    line: { color: colour, width: 1.5, dash }, legendgroup: group, hovertemplate: `${name} %{y}<extra></extra>`,
  };
}

/**
 * The zone edges [low, high] of output j (null where absent): from the answer's zones (absolute,
 * named by tag), else from the request's zones (one entry per output, or vectors of edges).
 */
function zoneEdges(answer, request, name, j) {
  const edge = (v) => (typeof v === "number" && Number.isFinite(v) ? v : null);
  if (Array.isArray(answer?.zones)) {
    const reported = answer.zones.find((z) => z && z.output === name);
    return reported ? [edge(reported.low), edge(reported.high)] : [null, null];
  }
  const given = request?.zones;
  if (Array.isArray(given)) {
    const zone = given[j];
    return zone && typeof zone === "object" ? [edge(zone.low), edge(zone.high)] : [null, null];
  }
  const zones = given || {};
  return [at(pick(zones, "low", "min", "lower"), j), at(pick(zones, "high", "max", "upper"), j)];
}

/**
 * The input targets of a run, per step and input (engineering units, absolute with an operating
 * point), for the inputs that carry an input weight (weights.input): scenario.input_targets (default:
 * the operating point's inputs, else 0) changed by scenario.input_target_changes from their step on.
 * Null for an input without input weight (its target has no effect) or a request without any.
 */
export function inputTargets(request, steps, inputs) {
  const weight = request?.weights?.input;
  if (!Array.isArray(weight) || !weight.length) return null;
  const weighted = Array.from({ length: inputs }, (_, j) => {
    const w = weight[j];
    return Array.isArray(w) ? w.some((v) => v !== 0) || weight.some((row) => Array.isArray(row) && row[j] !== 0) : typeof w === "number" && w !== 0;
  });
  if (!weighted.some(Boolean)) return null;
  const scenario = request?.scenario || {};
  const base = scenario.input_targets ?? request?.model?.operating_point?.inputs ?? Array(inputs).fill(0);
  const changes = [...(scenario.input_target_changes || [])].sort((a, b) => a.step - b.step);
  const series = [];
  let now = base;
  let next = 0;
  for (let k = 0; k < steps; k += 1) {
    while (next < changes.length && changes[next].step <= k) now = changes[next++].value;
    series.push(now);
  }
  return Array.from({ length: inputs }, (_, j) => (weighted[j] ? series.map((row) => at(row, j)) : null));
}

function axisTitle(signal, fallback) {
  const name = signal?.name ?? fallback;
  return signal?.unit ? `${name} [${signal.unit}]` : name;
}

/**
 * One chart per signal of a /simulate answer: each output with its measurement, setpoint,
 * zone and limits; each input with its limits and, below it, its moves and move limits.
 */
export function drawResponses(container, answer, request) {
  container.replaceChildren();
  const drawn = [];
  const time = answer.time || [];
  const plant = answer.design?.plant || {};
  const columns = answer.columns || {};
  const limits = request?.limits || {};
  const timeTitle = "time (model time unit)";
  const outputs = columns.outputs || [];
  outputs.forEach((name, j) => {
    const signal = plant.outputs?.[j] ?? { name };
    const title = axisTitle(signal, name);
    const div = chartBox(container, {
      id: `response-output-${j}`, testid: "response-chart", label: `Output ${name}`, filename: `output-${name}`,
    });
    const traces = [
      { type: "scatter", mode: "lines", name: `${name}`, x: time, y: column(answer.outputs, j), line: { color: COLOURS.blue, width: 2 } },
    ];
    if (answer.measured && !columns.measured_own) traces.push({
      type: "scatter", mode: "lines", name: "measured", x: time, y: column(answer.measured, j),
      line: { color: COLOURS.sky, width: 1, dash: "dot" }, opacity: 0.9,
    });
    const [low, high] = zoneEdges(answer, request, signal.name ?? name, j);
    // a zone output has no setpoint (its weight is zero inside the zone): its zone is drawn instead
    if (answer.setpoints && low === null && high === null) traces.push({
      type: "scatter", mode: "lines", name: "setpoint", x: time, y: column(answer.setpoints, j),
      line: { color: COLOURS.black, width: 1.5, dash: "dash", shape: "hv" },
    });
    if (low !== null && high !== null) {
      traces.push(level("zone low", time, low, COLOURS.green, "longdash", "zone"));
      traces.push({ ...level("zone high", time, high, COLOURS.green, "longdash", "zone"), fill: "tonexty", fillcolor: "rgba(0,158,115,0.10)" });
    } else if (low !== null) {
      traces.push(level("zone low", time, low, COLOURS.green, "longdash", "zone"));
    } else if (high !== null) {
      traces.push(level("zone high", time, high, COLOURS.green, "longdash", "zone"));
    }
    const ymin = at(limits.output_min, j);
    const ymax = at(limits.output_max, j);
    if (ymin !== null) traces.push(level("lower limit", time, ymin, COLOURS.vermillion, "dashdot", "limits"));
    if (ymax !== null) traces.push(level("upper limit", time, ymax, COLOURS.vermillion, "dashdot", "limits"));
    window.Plotly.react(div, traces, baseLayout(`Output ${title}`, {
      xaxis: { title: { text: timeTitle } }, yaxis: { title: { text: title } },
    }), config(div.dataset.filename));
    drawn.push(div);
  });
  const inputs = columns.inputs || [];
  const initial = request?.scenario?.initial?.input ?? request?.model?.operating_point?.inputs ?? null;
  const targets = inputTargets(request, time.length, inputs.length);
  inputs.forEach((name, j) => {
    const signal = plant.inputs?.[j] ?? { name };
    const title = axisTitle(signal, name);
    const u = column(answer.inputs, j);
    const before = initial ? at(initial, j) ?? 0 : 0;
    const moves = u.map((v, k) => (k === 0 ? v - before : v - u[k - 1]));
    const div = chartBox(container, {
      id: `response-input-${j}`, testid: "response-chart", label: `Input ${name}`, filename: `input-${name}`,
    });
    const traces = [
      { type: "scatter", mode: "lines", name: `${name}`, x: time, y: u, line: { color: COLOURS.orange, width: 2, shape: "hv" } },
      { type: "bar", name: "move", x: time, y: moves, yaxis: "y2", marker: { color: COLOURS.purple }, hovertemplate: "move %{y}<extra></extra>" },
    ];
    if (targets?.[j]) traces.push({
      type: "scatter", mode: "lines", name: "input target", x: time, y: targets[j],
      line: { color: COLOURS.green, width: 1.5, dash: "dash", shape: "hv" }, hovertemplate: "input target %{y}<extra></extra>",
    });
    const umin = at(limits.input_min, j);
    const umax = at(limits.input_max, j);
    if (umin !== null) traces.push(level("lower limit", time, umin, COLOURS.vermillion, "dashdot", "limits"));
    if (umax !== null) traces.push(level("upper limit", time, umax, COLOURS.vermillion, "dashdot", "limits"));
    const dumax = at(limits.move_max, j);
    if (dumax !== null) {
      traces.push({ ...level("move limit", time, dumax, COLOURS.vermillion, "dot", "moves"), yaxis: "y2" });
      traces.push({ ...level("move limit", time, -dumax, COLOURS.vermillion, "dot", "moves"), yaxis: "y2", showlegend: false });
    }
    window.Plotly.react(div, traces, baseLayout(`Input ${title}`, {
      xaxis: { title: { text: timeTitle }, anchor: "y2" },
      yaxis: { title: { text: title }, domain: [0.36, 1] },
      yaxis2: { title: { text: signal.unit ? `move [${signal.unit}]` : "move" }, domain: [0, 0.26] },
      bargap: 0,
    }), config(div.dataset.filename));
    drawn.push(div);
  });
  // the measured disturbances the scenario applied (absolute with an operating point), which the
  // feed-forward gain Kd acts on: without them an output's upset has no visible cause
  (columns.measured_disturbances || []).forEach((name, k) => {
    const signal = plant.disturbances?.[k] ?? { name };
    const title = axisTitle(signal, name);
    const div = chartBox(container, {
      id: `response-disturbance-${k}`, testid: "response-chart", label: `Measured disturbance ${name}`, filename: `disturbance-${name}`,
    });
    const traces = [{
      type: "scatter", mode: "lines", name, x: time, y: column(answer.measured_disturbances || [], k),
      line: { color: COLOURS.vermillion, width: 2, shape: "hv", dash: "dot" },
    }];
    window.Plotly.react(div, traces, baseLayout(`Measured disturbance ${title}`, {
      xaxis: { title: { text: timeTitle } }, yaxis: { title: { text: title } },
    }), config(div.dataset.filename));
    drawn.push(div);
  });
  return fitToCells(drawn);
}

/** " (tag, tag)": the signals the output-side loop is broken at (the sensors' with measured outputs of their own). */
export function outputSignals(robustness) {
  const names = robustness.plant_output_signals;
  if (!Array.isArray(names) || !names.length) return "";
  return names.length <= 4 ? ` (${names.join(", ")})` : ` (${names.slice(0, 3).join(", ")}, … ${names.length} signals)`;
}

/** Singular values of S and T over frequency at the plant output and input, peaks marked. */
export function drawRobustness(container, robustness) {
  container.replaceChildren();
  const drawn = [];
  const frequencies = robustness.frequencies || [];
  for (const [key, where] of [["plant_output", `at the plant output${outputSignals(robustness)}`], ["plant_input", "at the plant input"]]) {
    const block = robustness[key];
    if (!block || !block.sensitivity) continue;
    const div = chartBox(container, {
      id: `robustness-${key}`, testid: "robustness-chart", label: `S and T ${where}`, filename: `sensitivity-${key}`,
    });
    const trace = (name, values, colour, dash) => ({
      type: "scatter", mode: "lines", name, x: frequencies, y: values, line: { color: colour, width: dash ? 1.5 : 2, dash },
      hovertemplate: `${name}<br>ω %{x:.4g}<br>%{y:.4g}<extra></extra>`,
    });
    const traces = [
      trace("largest σ(S)", block.sensitivity.largest, COLOURS.blue),
      trace("smallest σ(S)", block.sensitivity.smallest, COLOURS.blue, "dot"),
      trace("largest σ(T)", block.complementary?.largest, COLOURS.orange),
      trace("smallest σ(T)", block.complementary?.smallest, COLOURS.orange, "dot"),
    ];
    const peaks = [];
    if (block.peak_sensitivity_frequency) peaks.push(["peak of S", block.peak_sensitivity_frequency, block.peak_sensitivity, COLOURS.blue]);
    if (block.peak_complementary_frequency) peaks.push(["peak of T", block.peak_complementary_frequency, block.peak_complementary, COLOURS.orange]);
    for (const [name, w, value, colour] of peaks) {
      traces.push({
        type: "scatter", mode: "markers+text", name: `${name} ${fmt(value, 4)}`, x: [w], y: [value],
        marker: { symbol: "triangle-down", size: 12, color: colour, line: { color: COLOURS.black, width: 1 } },
        text: [fmt(value, 4)], textposition: "top center", hovertemplate: `${name} %{y:.5g} at ω %{x:.4g}<extra></extra>`,
      });
    }
    window.Plotly.react(div, traces, baseLayout(`Singular values of S and T ${where}`, {
      xaxis: { type: "log", title: { text: "frequency (rad per time unit)" } },
      yaxis: { type: "log", title: { text: "singular value" } },
    }), config(div.dataset.filename));
    drawn.push(div);
  }
  return fitToCells(drawn);
}

/** The chosen (base request's) value of a sweep's parameter, when the base request says it. */
export function chosenValue(request) {
  const design = request?.design || {};
  const parameter = request?.parameter;
  const signal = request?.signal;
  // one signal's weight; with no signal every weight takes the value, so the base has one only when all agree
  const weight = (w) => {
    if (typeof w === "number") return w;
    if (!Array.isArray(w) || !w.length || !w.every((x) => typeof x === "number")) return undefined;
    if (signal === null || signal === undefined) return w.every((x) => x === w[0]) ? w[0] : undefined;
    return w[signal];
  };
  if (parameter === "move_weight") return weight(design.weights?.move);
  if (parameter === "output_weight") return weight(design.weights?.output);
  // no weights.input is a zero input weight on every input (the sweep's own reading of it)
  if (parameter === "input_weight") return design.weights?.input == null ? 0 : weight(design.weights.input);
  if (parameter) return design.horizons?.[parameter];
  return undefined;
}

/** The sweep's figures side by side, one small chart per figure, the chosen value highlighted. */
export function drawSweep(container, answer, request) {
  container.replaceChildren();
  const entries = answer.entries || [];
  const values = entries.map((e) => e.value);
  const chosen = chosenValue(request);
  const isChosen = (v) => chosen !== undefined && Math.abs(v - chosen) <= 1e-12 * Math.max(1, Math.abs(chosen));
  const positive = values.every((v) => v > 0);
  const logX = positive && Math.max(...values) / Math.min(...values) > 20;
  const figures = [
    ["spectral radius", (e) => e.spectral_radius, false],
    ["Hessian condition number", (e) => e.condition_number, true],
    ["peak sensitivity", (e) => e.peak_sensitivity, false],
  ];
  const outputs = entries.find((e) => e.performance)?.performance?.outputs || [];
  outputs.forEach((o, j) => {
    figures.push([`IAE of ${o.name}`, (e) => e.performance?.outputs?.[j]?.integral_absolute_error, false]);
    figures.push([`overshoot of ${o.name} (%)`, (e) => e.performance?.outputs?.[j]?.overshoot_percent, false]);
  });
  const drawn = [];
  figures.forEach(([name, get, logY], k) => {
    const ys = entries.map((e) => { const v = get(e); return typeof v === "number" ? v : null; });
    if (ys.every((v) => v === null)) return;
    const div = chartBox(container, { id: `sweep-${k}`, testid: "sweep-chart", label: `${name} against ${answer.parameter}`, filename: `sweep-${k}` });
    const mark = values.map((v) => isChosen(v));
    const traces = [
      {
        type: "scatter", mode: "lines+markers", name, x: values, y: ys,
        line: { color: COLOURS.blue, width: 1.5 }, marker: { color: COLOURS.blue, size: 7 },
        hovertemplate: `${answer.parameter} %{x}<br>${name} %{y:.5g}<extra></extra>`,
      },
    ];
    if (mark.some(Boolean)) traces.push({
      type: "scatter", mode: "markers", name: "chosen value", x: values.filter((_, i) => mark[i]), y: ys.filter((_, i) => mark[i]),
      marker: { symbol: "star", size: 16, color: COLOURS.orange, line: { color: COLOURS.black, width: 1 } },
      hovertemplate: "chosen %{x}: %{y:.5g}<extra></extra>",
    });
    window.Plotly.react(div, traces, baseLayout(name, {
      showlegend: false,
      margin: { l: 56, r: 12, t: 36, b: 44 },
      xaxis: { type: logX ? "log" : "linear", title: { text: answer.parameter } },
      yaxis: { type: logY ? "log" : "linear" },
    }), config(div.dataset.filename));
    drawn.push(div);
  });
  return { drawn: fitToCells(drawn), chosen, isChosen };
}

/** The fitted unit-step responses of /identify: one chart per output, one line per input. */
export function drawStepResponses(container, steps) {
  container.replaceChildren();
  const palette = [COLOURS.blue, COLOURS.orange, COLOURS.green, COLOURS.vermillion, COLOURS.purple, COLOURS.sky];
  const dashes = ["solid", "dash", "dot", "dashdot", "longdash", "longdashdot"];
  const outputs = [...new Set(steps.map((s) => s.output))];
  const drawn = [];
  outputs.forEach((output, i) => {
    const div = chartBox(container, {
      id: `step-${i}`, testid: "step-chart", label: `Fitted step responses of ${output}`, filename: `step-${output}`,
    });
    const traces = steps.filter((s) => s.output === output).map((s, j) => ({
      type: "scatter", mode: "lines", name: `step of ${s.input}`, x: s.time, y: s.value,
      line: { color: palette[j % palette.length], dash: dashes[j % dashes.length], width: 2 },
      hovertemplate: `${output} per unit ${s.input}<br>t %{x:.4g}<br>%{y:.5g}<extra></extra>`,
    }));
    window.Plotly.react(div, traces, baseLayout(`${output}: fitted unit-step responses`, {
      xaxis: { title: { text: "time after the step" } },
      yaxis: { title: { text: `${output} per unit input` } },
    }), config(div.dataset.filename));
    drawn.push(div);
  });
  return fitToCells(drawn);
}
