// The movecast workbench: edit a request, post it to the service, look at the answer.
// Every URL is relative to the page, so the page works at the root and under a prefix.

import { Editor, prettyJson, syntaxErrorOffset } from "./editor.js";
import { drawPoleMap, drawResponses, drawRobustness, drawStepResponses, drawSweep, outputSignals, saveImage } from "./charts.js";
import { fmt, matrixTable, recordTable } from "./tables.js";

const KEY_STORE = "movecast.api-key";
const $ = (id) => document.getElementById(id);
// seq: the number of the latest call; an answer to an earlier one that arrives later is dropped
const state = { request: null, answer: null, endpoint: null, examples: [], csv: null, seq: 0 };
const editor = new Editor($("request-text"), $("field-notes"));
const authRequired = document.querySelector('meta[name="movecast-auth"]')?.content === "required";

function url(path) {
  return new URL(path, document.baseURI).toString();
}

// The service answers every call within its compute limit (a 503 past it); the page waits that
// long and a margin more (the server's figure, in seconds), then gives up and says so.
const answerWait = Number(document.querySelector('meta[name="movecast-answer-wait"]')?.content) || 35;

function deadlineError() {
  const error = new Error(`no answer came within ${answerWait} s, the longest the service takes to answer or refuse; `
    + "a proxy or the network in between holds the call. Try again later.");
  error.deadline = true;
  return error;
}

/** What `pending` gives; past the page's deadline (fetch's TimeoutError) the error says so in words. */
async function withDeadline(pending) {
  try {
    return await pending;
  } catch (error) {
    throw error?.name === "TimeoutError" || error?.name === "AbortError" ? deadlineError() : error;
  }
}

/** fetch with the page's deadline over the whole exchange, the answer's body included. */
const send = (path, options = {}) => withDeadline(fetch(url(path), { ...options, signal: AbortSignal.timeout(answerWait * 1000) }));
/** The answer's JSON, or its text; a body that is no JSON or is cut by the deadline is an error. */
const jsonOf = (response) => withDeadline(response.json());
const textOf = (response) => withDeadline(response.text());

/** The answer's JSON, or null when its body is no JSON; a body cut by the deadline is an error. */
function jsonOrNull(response) {
  return jsonOf(response).catch((error) => {
    if (error.deadline) throw error;
    return null;
  });
}

function setStatus(text) {
  $("status").textContent = text;
}

function apiKey() {
  return $("api-key").value.trim();
}

function headers() {
  const h = { "Content-Type": "application/json", Accept: "application/json" };
  const key = apiKey();
  if (key) h.Authorization = `Bearer ${key}`;
  return h;
}

// ---- examples and the editor ---------------------------------------------------------

function guessEndpoint(body) {
  if (body && typeof body === "object") {
    if (body.parameter !== undefined && body.design !== undefined) return "design/sweep";
    if (body.scenario !== undefined) return "simulate";
    if (body.data !== undefined && body.inputs !== undefined && body.outputs !== undefined) return "identify";
  }
  return "design";
}

async function loadExamples() {
  const response = await send("workbench/examples");
  state.examples = (await jsonOf(response)).filter((e) => [...$("endpoint").options].some((o) => o.value === e.endpoint));
  const select = $("example");
  select.replaceChildren();
  for (const e of state.examples) {
    const option = document.createElement("option");
    option.value = e.name;
    option.textContent = `${e.name} (POST /${e.endpoint})`;
    select.append(option);
  }
  const first = state.examples.find((e) => e.name === "design_request.json") || state.examples[0];
  if (first) {
    select.value = first.name;
    await openExample(first.name);
  }
}

async function openExample(name) {
  const entry = state.examples.find((e) => e.name === name);
  let body;
  try {
    const response = await send(`workbench/examples/${encodeURIComponent(name)}`);
    if (!response.ok) throw new Error(`the service answered ${statusWords(response)}`);
    body = await jsonOf(response);
  } catch (error) {
    setStatus(`The bundled example ${name} could not be opened (${error.message}); the editor is unchanged.`);
    return;
  }
  editor.text = prettyJson(body);
  $("endpoint").value = entry ? entry.endpoint : guessEndpoint(body);
  clearErrors();
  setStatus(`Opened ${name}.`);
}

$("example").addEventListener("change", (event) => openExample(event.target.value));

$("upload").addEventListener("change", async (event) => {
  const file = event.target.files?.[0];
  if (!file) return;
  const text = await file.text();
  editor.text = text;
  clearErrors();
  try {
    $("endpoint").value = guessEndpoint(JSON.parse(text));
    setStatus(`Opened ${file.name}.`);
  } catch (error) {
    showSyntaxError(text, error);
  }
});

// ---- a plant test as CSV -------------------------------------------------------------

/** The tags of a CSV's header row (the first column is the time). */
export function csvTags(text) {
  const header = (text.split(/\r?\n/, 1)[0] || "").replace(/^\uFEFF/, "");
  return header.split(",").map((t) => t.trim().replace(/^"|"$/g, "")).filter(Boolean).slice(1);
}

$("upload-csv").addEventListener("change", async (event) => {
  const file = event.target.files?.[0];
  if (!file) return;
  state.csv = await file.text();
  const tags = csvTags(state.csv);
  $("csv-name").textContent = file.name;
  $("csv-columns").textContent = `Columns after the time: ${tags.join(", ") || "none"}. Name which are inputs and which are outputs.`;
  if (!$("csv-inputs").value && tags.length > 1) $("csv-inputs").value = tags.slice(0, -1).join(",");
  if (!$("csv-outputs").value && tags.length) $("csv-outputs").value = tags[tags.length - 1];
  $("csv-options").hidden = false;
  clearErrors();
  setStatus(`Opened ${file.name}: ${tags.length} tags.`);
});

async function identifyCsv() {
  if (!state.csv) return;
  clearErrors();
  const query = new URLSearchParams({
    sample_time: $("csv-sample-time").value,
    inputs: $("csv-inputs").value.trim(),
    outputs: $("csv-outputs").value.trim(),
    structure: $("csv-structure").value,
  });
  const h = headers();
  h["Content-Type"] = "text/csv";
  $("identify-csv").disabled = true;
  setStatus("Running POST /identify (text/csv)…");
  const started = performance.now();
  const mine = ++state.seq;
  try {
    const response = await send(`identify?${query}`, { method: "POST", headers: h, body: state.csv });
    const answer = await jsonOrNull(response);
    if (mine !== state.seq) return;  // a later call is running or answered: this answer is not the one to show
    if (!response.ok) {
      handleFailure(response, answer, "identify", { inEditor: false });
      return;
    }
    if (!answer || typeof answer !== "object") {
      notAnAnswer(response, "identify", { inEditor: false });
      return;
    }
    state.request = Object.fromEntries(query);
    state.answer = answer;
    state.endpoint = "identify";
    render("identify", answer, state.request);
    setStatus(`POST /identify (text/csv) answered in ${Math.round(performance.now() - started)} ms.`);
  } catch (error) {
    if (mine === state.seq) setStatus(`The service could not be reached: ${error.message}`);
  } finally {
    $("identify-csv").disabled = false;
  }
}

$("identify-csv").addEventListener("click", identifyCsv);

$("format").addEventListener("click", () => {
  try {
    editor.text = prettyJson(JSON.parse(editor.text));
    clearErrors();
  } catch (error) {
    showSyntaxError(editor.text, error);
  }
});

$("request-text").addEventListener("keydown", (event) => {
  if (event.key === "Enter" && (event.ctrlKey || event.metaKey)) {
    event.preventDefault();
    run();
  }
});

// ---- problems ------------------------------------------------------------------------

function clearErrors() {
  editor.clear();
  $("errors").hidden = true;
  $("errors-list").replaceChildren();
  $("errors-detail").textContent = "";
  $("key-error").textContent = "";
}

function showProblems(detail, problems, { keepAnswer = false, inEditor = true, title = "Problems with the request" } = {}) {
  // the answer on screen belonged to an earlier request: it goes, so that it is never read as this
  // one's (a download of the answer on screen that fails keeps it)
  if (!keepAnswer) clearResults();
  $("errors").hidden = false;
  $("errors-title").textContent = title;
  $("errors-detail").textContent = detail;
  const list = $("errors-list");
  list.replaceChildren();
  editor.mark(inEditor ? problems : []);  // a CSV form's fields are not in the editor's text
  for (const problem of problems) {
    const item = document.createElement("li");
    item.dataset.pointer = problem.pointer;
    let where;
    if (inEditor) {
      where = document.createElement("button");
      where.type = "button";
      where.className = "pointer";
      where.setAttribute("aria-label", `Go to ${problem.pointer || "the start of the body"} in the editor`);
      where.addEventListener("click", () => editor.reveal(problem.pointer));
    } else {
      where = document.createElement("code");  // a field of the CSV form's query, not of the editor's text
    }
    where.textContent = problem.pointer || "(the whole body)";
    item.append(where, document.createTextNode(` ${problem.detail}`));
    list.append(item);
  }
}

function showSyntaxError(text, error) {
  const offset = syntaxErrorOffset(text, String(error.message));
  showProblems("The request is not valid JSON; nothing was sent.", [{ pointer: "", detail: String(error.message), offset }]);
  setStatus("Not valid JSON.");
}

// ---- running -------------------------------------------------------------------------

async function run() {
  // from now on an answer to any earlier call (a run, a fit) is not this page's to show
  const mine = ++state.seq;
  clearErrors();
  const text = editor.text;
  let body;
  try {
    body = JSON.parse(text);
  } catch (error) {
    showSyntaxError(text, error);
    return;
  }
  const endpoint = $("endpoint").value;
  $("run").disabled = true;
  setStatus(`Running POST /${endpoint}…`);
  const started = performance.now();
  // Ctrl+Enter runs while an earlier run is in flight: the later run wins, whichever answers first
  try {
    const response = await send(endpoint, { method: "POST", headers: headers(), body: text });
    const answer = await jsonOrNull(response);
    if (mine !== state.seq) return;
    if (!response.ok) {
      handleFailure(response, answer);
      return;
    }
    if (!answer || typeof answer !== "object") {
      notAnAnswer(response, endpoint);
      return;
    }
    state.request = body;
    state.answer = answer;
    state.endpoint = endpoint;
    render(endpoint, answer, body);
    setStatus(`POST /${endpoint} answered in ${Math.round(performance.now() - started)} ms.`);
  } catch (error) {
    if (mine === state.seq) setStatus(`The service could not be reached: ${error.message}`);
  } finally {
    $("run").disabled = false;
  }
}

/** " Retry after 30 s." from a Retry-After header in seconds (or an HTTP date), else "". */
export function retryText(header) {
  if (!header) return "";
  const seconds = /^\s*\d+\s*$/.test(header) ? Number(header) : Math.round((Date.parse(header) - Date.now()) / 1000);
  return Number.isFinite(seconds) ? ` Retry after ${Math.max(0, seconds)} s.` : "";
}

/** A status in words: "503 Service Unavailable" (the number alone when the reason is not sent). */
function statusWords(response) {
  return `${response.status}${response.statusText ? ` ${response.statusText}` : ""}`;
}

/** A successful status whose body is no JSON answer (a proxy's or a login page's HTML, say): said, nothing drawn. */
function notAnAnswer(response, endpoint, { inEditor = true } = {}) {
  const type = response.headers.get("content-type") || "no content type";
  showProblems(`The service answered ${statusWords(response)} to POST /${endpoint}, but not with a JSON answer (${type}): `
    + "nothing can be shown. Is the page served through a proxy that answered in the service's place?", [], { inEditor, title: "No answer to show" });
  setStatus(`POST /${endpoint}: ${response.status}, not a JSON answer.`);
}

function handleFailure(response, problem, endpoint = $("endpoint").value, { keepAnswer = false, inEditor = true } = {}) {
  const detail = (problem?.detail || `The service answered ${statusWords(response)}.`) + retryText(response.headers.get("retry-after"));
  if (response.status === 401) {
    $("key-row").hidden = false;
    $("key-error").textContent = detail;
    showProblems(detail, [], { keepAnswer, inEditor });
    $("api-key").focus();
    setStatus("An API key is needed.");
    return;
  }
  const problems = Array.isArray(problem?.errors) ? problem.errors.map((e) => ({ pointer: e.pointer ?? "", detail: e.detail ?? "" })) : [];
  // a busy or failed service (429, 5xx) is no fault of the request: said so above its words
  const busy = response.status === 429 || response.status >= 500;
  showProblems(detail, problems, { keepAnswer, inEditor, title: busy ? "The service could not answer this request" : "Problems with the request" });
  setStatus(`POST /${endpoint}: ${response.status} ${problem?.title || response.statusText || ""}`.trim());
}

$("run").addEventListener("click", run);

// ---- the answer ----------------------------------------------------------------------

function show(id, visible) {
  $(id).hidden = !visible;
}

const RESULT_SECTIONS = ["summary", "poles", "responses", "robustness", "gains", "sweep", "identify", "downloads"];

function clearResults() {
  for (const id of RESULT_SECTIONS) show(id, false);
  state.answer = null;
}

function render(endpoint, answer, request) {
  for (const id of RESULT_SECTIONS) show(id, false);
  if (endpoint === "design/sweep") {
    renderSweep(answer, request);
  } else if (endpoint === "identify") {
    renderIdentify(answer);
  } else {
    const design = endpoint === "simulate" ? answer.design : answer;
    if (design) renderDesign(design, answer, request);
    if (endpoint === "simulate") renderResponses(answer, request);
  }
  show("downloads", true);
  $("download-series").hidden = endpoint !== "simulate";
  const law = endpoint === "design";
  $("download-law-st").hidden = !law;
  $("download-law-ss").hidden = !law;
}

function setFigure(id, value) {
  const node = $(id);
  node.textContent = fmt(value);
  node.dataset.value = value === null || value === undefined ? "" : String(value);
}

function marginalModes(design) {
  const listed = design.closed_loop?.marginal_modes ?? design.marginal_modes ?? design.closed_loop?.marginal ?? [];
  const modes = Array.isArray(listed) ? listed : [];
  const poles = modes.map((m) => m.pole ?? m).filter((p) => typeof p?.real === "number" && typeof p?.imag === "number");
  const onCircle = (design.closed_loop?.poles || []).filter((p) => Math.abs(Math.hypot(p.real, p.imag) - 1) <= 1e-9);
  return { modes, poles: poles.length ? poles : onCircle };
}

function renderDesign(design, whole, request) {
  show("summary", true);
  setFigure("spectral-radius", design.closed_loop?.spectral_radius);
  $("stable").textContent = loopVerdict(design.closed_loop);
  const h = design.hessian || {};
  setFigure("condition-number", h.condition_number);
  $("eigenvalues").textContent = `${fmt(h.smallest_eigenvalue)}, ${fmt(h.largest_eigenvalue)}`;
  $("hessian-size").textContent = h.size ?? "—";
  const loop = whole.whole_loop;
  $("whole-loop").textContent = loop ? `spectral radius ${fmt(loop.spectral_radius)}, ${loopVerdict(loop)}` : "— (no estimator in this answer)";
  // the controller and estimator designed on the model, run on the scenario's true plant (model error)
  const truth = whole.true_loop;
  $("true-loop").textContent = truth ? `spectral radius ${fmt(truth.spectral_radius)}, ${loopVerdict(truth)}` : "— (no true plant in this answer)";
  $("true-loop").dataset.value = truth ? String(truth.spectral_radius) : "";
  $("conditioning").textContent = conditioningText(h);
  const warnings = [...(design.warnings || []), ...(whole !== design ? whole.warnings || [] : [])];
  const list = $("warnings");
  list.replaceChildren();
  if (!warnings.length) list.append(Object.assign(document.createElement("li"), { textContent: "None." }));
  for (const w of warnings) {
    const item = document.createElement("li");
    const code = document.createElement("code");
    code.textContent = w.code;
    item.append(code, document.createTextNode(`: ${w.message}`));
    const fix = w.fix ?? w.suggestion ?? w.remedy;
    if (fix) item.append(document.createTextNode(` Fix: ${typeof fix === "string" ? fix : JSON.stringify(fix)}`));
    list.append(item);
  }
  $("fingerprint").textContent = whole.fingerprint || design.fingerprint || "";
  const check = design.limit_check;
  const plant = design.plant || {};
  $("limit-check").replaceChildren();
  renderModelError(design.model_error);
  if (check?.violated && Array.isArray(check.violations) && check.violations.length) {
    $("limit-check").append(recordTable({
      id: "limit-check-table",
      caption: `The unconstrained law against the limits: its worst sample over ${check.steps} samples after a setpoint step of `
        + `${(check.nominal_step || []).map((v, i) => `${fmt(v)} on ${tagged(plant.outputs, plant.outputs?.[i]?.name ?? `output ${i + 1}`)}`).join(", ")}`,
      columns: [["signal [unit]", (v) => limitTag(plant, v)], ["which limit", (v) => `${v.kind} ${v.side}`], ["step (sample)", (v) => v.step],
        ["value (unit)", (v) => v.value], ["limit (unit)", (v) => v.limit]],
      records: check.violations,
    }));
  }

  show("poles", true);
  const estimator = whole.estimator?.poles || whole.whole_loop?.estimator_poles || design.robustness?.estimator?.poles || [];
  const marginal = marginalModes(design);
  const poleDiv = $("pole-map");
  poleDiv.dataset.filename = "poles";
  const truthPoles = whole.true_loop?.poles || [];
  drawPoleMap(poleDiv, { closed: design.closed_loop?.poles || [], open: design.plant?.open_loop_poles || [], estimator, marginal: marginal.poles, truth: truthPoles });
  $("marginal").textContent = marginalText(marginal, (design.plant?.inputs || []).map((s) => s.name));
  renderPoleTable(design, estimator, truthPoles);

  if (design.robustness?.frequencies) {
    show("robustness", true);
    drawRobustness($("robustness-charts"), design.robustness);
    $("robustness-text").textContent = robustnessText(design.robustness);
  }
  renderGains(design, request);
}

/** A loop's verdict in words: a pole on the unit circle by a named structural cause is marginal, not unstable. */
export function loopVerdict(loop) {
  if (!loop) return "—";
  if (loop.stable) return "stable (all poles inside the unit circle)";
  const modes = Array.isArray(loop.marginal_modes) ? loop.marginal_modes : [];
  const outside = (loop.poles || []).some((p) => Math.hypot(p.real, p.imag) > 1 + 1e-6);
  if (modes.length && !outside) {
    const causes = [...new Set(modes.map((m) => m.cause))].join(", ");
    return `marginal: ${modes.length} pole(s) on the unit circle (${causes}; see the warnings), none outside`;
  }
  if (!outside && (loop.poles || []).length) {
    // a report without causes (the loop on the true plant): on the circle within 1e-6, as the API judges
    const on = loop.poles.filter((p) => Math.hypot(p.real, p.imag) >= 1 - 1e-6).length;
    return `marginal: ${on} pole(s) on the unit circle, none outside (see the warnings)`;
  }
  return "NOT stable";
}

function conditioningText(h) {
  if (typeof h.condition_number !== "number") return "";
  const digits = Math.log10(h.condition_number);
  return `The Hessian G'QG + R of size ${h.size} has condition number ${fmt(h.condition_number, 4)}: about ${digits.toFixed(1)} of the ~16 decimal digits of double precision are at risk in the optimal moves. `
    + (digits > 10 ? "That is high: raise the move weights, shorten the control horizon or block the moves." : "That is comfortable for double precision.");
}

/** One marginal mode in words: its cause and pole, the signals it concerns, its input direction (inputs' own units). */
function modeText(mode, inputs) {
  const pole = mode.pole ? ` at z = ${fmt(mode.pole.real)}${mode.pole.imag ? ` ${mode.pole.imag < 0 ? "−" : "+"} ${fmt(Math.abs(mode.pole.imag))}j` : ""}` : "";
  const signals = mode.signals?.length ? ` (${mode.signals.join(", ")})` : "";
  const direction = Array.isArray(mode.direction)
    ? `; input direction ${mode.direction.map((v, j) => `${v < 0 ? "−" : "+"}${fmt(Math.abs(v))} ${inputs[j] ?? `u${j + 1}`}`).join(" ")}`
    : "";
  return `${mode.cause ?? mode.message ?? "marginal"}${pole}${signals}${direction}.`;
}

function marginalText({ modes, poles }, inputs = []) {
  if (modes.length) {
    return `${modes.length} closed-loop pole(s) on the unit circle, marked with squares: ${modes.map((m) => modeText(m, inputs)).join(" ")} The warnings give each cause's fix.`;
  }
  return poles.length ? `${poles.length} closed-loop pole(s) on the unit circle, marked with squares; see the warnings for the cause.` : "No closed-loop pole on the unit circle.";
}

function renderPoleTable(design, estimator, truth = []) {
  const rows = [];
  const add = (kind, poles) => poles.forEach((p) => rows.push({ kind, ...p }));
  add("closed loop", design.closed_loop?.poles || []);
  add("open loop", design.plant?.open_loop_poles || []);
  add("estimator", estimator);
  add("loop on the true plant", truth);
  $("pole-table").replaceChildren(recordTable({
    id: "poles-list", caption: "Poles",
    columns: [["kind", (r) => r.kind], ["real", (r) => r.real], ["imaginary", (r) => r.imag], ["modulus", (r) => Math.hypot(r.real, r.imag)]],
    records: rows,
  }));
}

function robustnessText(r) {
  const parts = [];
  for (const [key, where] of [["plant_output", `plant output${outputSignals(r)}`], ["plant_input", "plant input"]]) {
    const b = r[key];
    if (!b) continue;
    parts.push(`At the ${where}: peak |S| ${fmt(b.peak_sensitivity, 4)} (${fmt(b.peak_sensitivity_db, 3)} dB) at ${fmt(b.peak_sensitivity_frequency, 4)} rad per time unit, peak |T| ${fmt(b.peak_complementary, 4)} at ${fmt(b.peak_complementary_frequency, 4)}, bandwidth ${fmt(b.bandwidth, 4)}.`);
  }
  if (r.estimator) parts.push(`Estimator (${r.estimator.kind}) spectral radius ${fmt(r.estimator.spectral_radius)}.`);
  return parts.join(" ");
}

/** The law the gain tables make up, in words: the terms this design has, around its operating point. */
export function lawText(gain, point) {
  const has = (key) => Array.isArray(gain?.[key]) && gain[key].length > 0;
  const around = Boolean(point);
  const terms = [around ? "Kr (r − z0)" : "Kr r"];
  if (has("input_target")) terms.push(around ? "+ Kt (u_target − u0)" : "+ Kt u_target");
  terms.push("− Kx x(k)", around ? "− Ku (u(k−1) − u0)" : "− Ku u(k−1)");
  if (has("disturbance")) terms.push(around ? "− Kd (d(k) − d0)" : "− Kd d(k)");
  const text = `du(k) = ${terms.join(" ")}.`;
  const symbols = has("disturbance") ? "z0, u0, d0" : "z0, u0";
  return around ? `${text} ${symbols}: the operating point (absolute values, as shown everywhere on this page); x: the model's state.` : text;
}

function renderGains(design, request) {
  const g = design.gain;
  if (!g) return;
  show("gains", true);
  $("gain-law").textContent = lawText(g, request?.model?.operating_point);
  const labels = g.labels || {};
  const rows = labels.rows || [];
  const box = $("gain-tables");
  box.replaceChildren();
  const tables = [
    ["setpoint", "Kr: setpoint gain", labels.setpoint],
    ["state", "Kx: state gain", labels.state],
    ["previous_input", "Ku: previous-input gain", labels.previous_input],
    ["disturbance", "Kd: measured-disturbance gain", labels.disturbance],
    ["input_target", "Kt: input-target gain", labels.input_target],
  ];
  for (const [key, caption, columns] of tables) {
    if (!Array.isArray(g[key]) || !g[key].length) continue;
    box.append(matrixTable({ id: `gain-${key}`, caption, rows, columns: columns || [], values: g[key], corner: "move of" }));
  }
  if (Array.isArray(g.horizon) && g.horizon.length) {
    const details = document.createElement("details");
    const summary = document.createElement("summary");
    summary.textContent = `Kh: the horizon gain (${g.horizon.length} × ${g.horizon[0].length})`;
    details.append(summary, matrixTable({ id: "gain-horizon", caption: "Kh: horizon gain on the free-response error", rows, columns: labels.horizon || [], values: g.horizon, corner: "move of" }));
    box.append(details);
  }
  const plantBox = $("plant-tables");
  plantBox.replaceChildren();
  const plantCaptions = [
    ["steady_state_gain", "Steady-state gain (output unit per input unit)"],
    ["relative_gain_array", "Relative gain array"],
    ["ramp_rate", "Ramp rate of the integrating outputs (output unit per sample per input unit)"],
  ];
  for (const [key, caption] of plantCaptions) {
    const m = design.plant?.[key];
    if (!m || !Array.isArray(m.values)) continue;
    // an integrating pair has no steady state: the API gives null, the ramp-rate table its slope
    const open = key === "steady_state_gain" && m.values.some((row) => row.some((v) => v === null));
    const text = open ? `${caption}; — : an integrating pair, with no steady state (see the ramp rate)` : caption;
    plantBox.append(matrixTable({ id: `plant-${key}`, caption: text, rows: m.rows || [], columns: m.columns || [], values: m.values }));
  }
}

/** analysis.model_error: the loop on the model with its gains scaled and its dead times lengthened, and the stable range. */
function renderModelError(error) {
  const box = $("model-error");
  box.replaceChildren();
  if (!error || !Array.isArray(error.cases) || !error.cases.length) return;
  const range = (r) => {
    const where = `${r.extra_dead_time} extra sample(s) of dead time`;
    if (r.lowest_stable_factor === null || r.lowest_stable_factor === undefined) return `with ${where}, the factor nearest 1 is not stable`;
    return `with ${where}, stable for gain factors ${fmt(r.lowest_stable_factor)} to ${fmt(r.highest_stable_factor)} (of those tried)`;
  };
  box.append(Object.assign(document.createElement("h3"), { textContent: "Model error" }));
  box.append(Object.assign(document.createElement("p"), {
    className: "prose", id: "model-error-ranges",
    textContent: `The loop of this controller and its ${error.estimator} estimator on the model with every gain multiplied by a factor `
      + `and every dead time lengthened: ${(error.stable_ranges || []).map(range).join("; ")}. Poles the design leaves on the unit circle `
      + "(a zone output, a spare input direction) are set aside for the verdict on the others.",
  }));
  box.append(recordTable({
    id: "model-error-cases", caption: "Each case asked (analysis.model_error)",
    columns: [["gain factor", (c) => c.gain_factor], ["extra dead time (samples)", (c) => c.extra_dead_time], ["spectral radius", (c) => c.spectral_radius],
      ["verdict", (c) => c.verdict], ["poles on the circle by design", (c) => c.nominal_circle_poles], ["other poles' spectral radius", (c) => c.rest_spectral_radius],
      ["their verdict", (c) => c.rest_verdict]],
    records: error.cases,
  }));
}

/** The tag of a limit's signal with its unit: an input's for input and move limits, an output's for output limits. */
function limitTag(plant, limit) {
  return tagged(limit.kind === "output" ? plant.outputs : plant.inputs, limit.signal);
}

/** A signal's tag with its unit, "name [unit]", from the design's plant block. */
function tagged(signals, name) {
  const unit = (signals || []).find((s) => s.name === name)?.unit;
  return unit ? `${name} [${unit}]` : name;
}

function renderResponses(answer, request) {
  show("responses", true);
  const outputs = answer.design?.plant?.outputs;
  const inputs = answer.design?.plant?.inputs;
  drawResponses($("response-charts"), answer, request);
  const perf = answer.performance;
  const box = $("performance");
  box.replaceChildren();
  if (perf?.outputs?.length) {
    box.append(recordTable({
      id: "performance-outputs", caption: "Outputs after their last setpoint change (a zone output has none: it is held in its range)",
      columns: [["output [unit]", (o) => (o.zone ? `${tagged(outputs, o.name)} (zone)` : tagged(outputs, o.name))], ["step (sample)", (o) => o.step],
        ["rise time (time unit)", (o) => o.rise_time], ["settling time (time unit)", (o) => o.settling_time],
        ["overshoot (%)", (o) => o.overshoot_percent], ["IAE (unit × time unit)", (o) => o.integral_absolute_error], ["final offset (unit)", (o) => o.final_offset]],
      records: perf.outputs,
    }));
  }
  if (perf?.inputs?.length) {
    box.append(recordTable({
      id: "performance-inputs", caption: "Inputs",
      columns: [["input [unit]", (o) => tagged(inputs, o.name)], ["total move (unit)", (o) => o.total_move], ["largest move (unit)", (o) => o.largest_move]],
      records: perf.inputs,
    }));
  }
  if (Array.isArray(answer.zones) && answer.zones.length) {
    box.append(recordTable({
      id: "performance-zones", caption: "Zone outputs in the run",
      columns: [["output [unit]", (z) => tagged(outputs, z.output)], ["low (unit)", (z) => z.low], ["high (unit)", (z) => z.high], ["fraction inside", (z) => z.fraction_inside],
        ["largest excursion (unit)", (z) => z.largest_excursion], ["first step outside (sample)", (z) => z.first_outside], ["ended inside", (z) => (z.ended_inside ? "yes" : "no")]],
      records: answer.zones,
    }));
  }
  const summary = answer.limit_summary;
  if (Array.isArray(summary?.signals) && summary.signals.length) {
    const plant = answer.design?.plant || {};
    box.append(recordTable({
      id: "limit-summary", caption: `Limits in the run: how long each was active${summary.fallbacks ? `; ${summary.fallbacks} step(s) whose QP failed held the last input` : ""}`,
      columns: [["signal [unit]", (l) => limitTag(plant, l)], ["which limit", (l) => `${l.kind} ${l.side}`],
        // the API gives move_max for both sides of a move: the lower bound of a move is its negative
        ["value (unit)", (l) => (l.kind === "move" && l.side === "min" ? -l.limit : l.limit)],
        ["steps at the limit", (l) => l.steps_at_limit], ["fraction of the run", (l) => l.fraction], ["largest slack (unit)", (l) => l.largest_slack]],
      records: summary.signals,
    }));
  }
  if (answer.diverged_at !== null && answer.diverged_at !== undefined) {
    box.append(Object.assign(document.createElement("p"), { textContent: `The run diverged at step ${answer.diverged_at}.` }));
  }
}

function renderSweep(answer, request) {
  show("sweep", true);
  const { chosen, isChosen } = drawSweep($("sweep-charts"), answer, request);
  const weight = ["move_weight", "output_weight", "input_weight"].includes(answer.parameter);
  const which = !weight ? "" : request.signal === null || request.signal === undefined ? " of every signal" : ` of signal ${request.signal}`;
  $("sweep-text").textContent = `${answer.parameter}${which} at ${answer.entries?.length ?? 0} values`
    + (chosen !== undefined ? `; the base request's value ${chosen} is starred.` : ".");
  $("sweep-table").replaceChildren(recordTable({
    id: "sweep-entries", caption: "Sweep entries",
    columns: [["value", (e) => e.value], ["status", (e) => e.status], ["spectral radius", (e) => e.spectral_radius], ["closed loop", sweepVerdict],
      ["condition number", (e) => e.condition_number], ["peak sensitivity", (e) => e.peak_sensitivity],
      ["warnings", (e) => (e.status === "designed" ? (e.warnings || []).map((w) => w.code).join(", ") || "none" : null)], ["problem", sweepProblem]],
    records: answer.entries || [],
    highlight: (e) => isChosen(e.value),
  }));
}

/** A sweep entry's verdict in /design's words: stable, marginal (a pole on the circle, none outside) or unstable. */
export function sweepVerdict(entry) {
  if (entry.stable === undefined || entry.stable === null) return null;
  if (entry.stable) return "stable";
  return (entry.warnings || []).some((w) => w.code === "unstable_closed_loop") ? "UNSTABLE" : "marginal";
}

/** Why a sweep entry failed: the problem's sentence and each field's, by pointer. */
function sweepProblem(entry) {
  const problem = entry.problem;
  if (!problem) return null;
  const fields = (problem.errors || []).map((e) => `${e.pointer}: ${e.detail}`);
  return [problem.detail, ...fields].filter(Boolean).join(" ") || JSON.stringify(problem);
}

function renderIdentify(answer) {
  show("identify", true);
  const fits = answer.fits || [];
  const worst = Math.min(...fits.map((f) => f.estimation?.nrmse_fit_percent ?? 100));
  $("identify-text").textContent = `${(answer.pairs || []).length} pair(s) fitted`
    + (fits.length ? `; the poorest output fit is ${fmt(worst, 3)} % (NRMSE).` : ".")
    + " Review the fit, the residuals and the warnings before designing with this model.";
  const box = $("identify-tables");
  box.replaceChildren();
  const parameter = (pair, name) => pair.parameters.find((q) => q.name === name);
  const value = (pair, name) => parameter(pair, name)?.estimate ?? null;
  // a standard error the API gives as null is not determined by the data: shown as "Infinity"
  const error = (pair, name) => {
    const q = parameter(pair, name);
    return q === undefined ? null : q.standard_error ?? Infinity;
  };
  const lag = (pair) => (parameter(pair, "time_constant") ? "time_constant" : "time_constant_1");
  box.append(recordTable({
    id: "identify-pairs", caption: "Fitted pairs (each estimate with its standard error)",
    columns: [["output", (r) => r.output], ["input", (r) => r.input], ["structure", (r) => r.structure],
      ["gain", (r) => value(r, "gain")], ["± gain", (r) => error(r, "gain")],
      ["time constant", (r) => value(r, lag(r))], ["± time constant", (r) => error(r, lag(r))],
      ["dead time", (r) => value(r, "dead_time")], ["± dead time", (r) => error(r, "dead_time")]],
    records: answer.pairs || [],
  }));
  box.append(recordTable({
    id: "identify-fits", caption: "Fit per output",
    columns: [["output", (f) => f.output], ["fit (NRMSE %)", (f) => f.estimation?.nrmse_fit_percent], ["R²", (f) => f.estimation?.r_squared],
      ["validation fit (%)", (f) => f.validation?.nrmse_fit_percent ?? null], ["residual std", (f) => f.residual_std]],
    records: fits,
  }));
  drawStepResponses($("step-charts"), answer.step_responses || []);
  const list = $("identify-warnings");
  list.replaceChildren();
  if (!(answer.warnings || []).length) list.append(Object.assign(document.createElement("li"), { textContent: "None." }));
  for (const w of answer.warnings || []) list.append(Object.assign(document.createElement("li"), { textContent: `${w.code}: ${w.message}` }));
}

/** A first /design request around a fitted model: unit weights, moderate horizons, to be tuned. */
export function designRequestFor(model) {
  const outputs = (model.outputs || []).length || (model.c || model.elements || []).length;
  const inputs = (model.inputs || []).length || (model.b?.[0] || model.elements?.[0] || []).length;
  return {
    model,
    horizons: { prediction: 60, control: 5 },
    weights: { output: Array(outputs).fill(1.0), move: Array(inputs).fill(0.1) },
  };
}

$("use-model").addEventListener("click", () => {
  if (!state.answer?.model) return;
  editor.text = prettyJson(designRequestFor(state.answer.model));
  $("endpoint").value = "design";
  clearErrors();
  setStatus("The fitted model is in the editor as a design request (unit weights, horizons 60 and 5): tune it, then run.");
  $("request-text").focus();
});

// ---- downloads -----------------------------------------------------------------------

function download(name, type, text) {
  const link = document.createElement("a");
  link.href = URL.createObjectURL(new Blob([text], { type }));
  link.download = name;
  document.body.append(link);
  link.click();
  setTimeout(() => { URL.revokeObjectURL(link.href); link.remove(); }, 1000);
}

$("download-request").addEventListener("click", () => download("request.json", "application/json", `${JSON.stringify(state.request, null, 2)}\n`));
$("download-answer").addEventListener("click", () => download(`answer-${state.endpoint.replace("/", "-")}.json`, "application/json", `${JSON.stringify(state.answer, null, 2)}\n`));
/** The service could not be reached for a download: said in the status, the answer on screen kept. */
function unreachable(what, error) {
  setStatus(`${what}: the service could not be reached (${error.message}); the answer on screen is kept.`);
}

/** The run's series as the service writes them (POST /simulate with Accept: text/csv), one format everywhere. */
async function downloadSeries() {
  setStatus("Running POST /simulate (text/csv)…");
  let text;
  try {
    const response = await send("simulate", {
      method: "POST", headers: { ...headers(), Accept: "text/csv, application/problem+json" }, body: JSON.stringify(state.request),
    });
    if (!response.ok) {
      handleFailure(response, await jsonOrNull(response), "simulate", { keepAnswer: true });
      return;
    }
    text = await textOf(response);
  } catch (error) {
    unreachable("POST /simulate (text/csv)", error);
    return;
  }
  download("series.csv", "text/csv", text);
  setStatus("POST /simulate (text/csv) answered: series.csv.");
}

$("download-series").addEventListener("click", downloadSeries);

async function exportLaw(format, name, type) {
  const body = JSON.stringify({ ...state.request, format });
  setStatus("Running POST /design/export…");
  let text;
  try {
    const response = await send("design/export", { method: "POST", headers: { ...headers(), Accept: `${type}, application/problem+json` }, body });
    if (!response.ok) {
      handleFailure(response, await jsonOrNull(response), "design/export", { keepAnswer: true });
      return;
    }
    text = await textOf(response);
  } catch (error) {
    unreachable("POST /design/export", error);
    return;
  }
  download(name, type, text);
  setStatus(`POST /design/export answered: ${name}.`);
}

$("download-law-st").addEventListener("click", () => exportLaw("structured_text", "law.st", "text/plain"));
$("download-law-ss").addEventListener("click", () => exportLaw("state_space", "law.json", "application/json"));
document.addEventListener("click", (event) => {
  const button = event.target.closest?.("button.save-image");
  if (button) saveImage($(button.dataset.chart));
});

// ---- start ---------------------------------------------------------------------------

function start() {
  if (authRequired) {
    $("key-row").hidden = false;
    $("api-key").value = sessionStorage.getItem(KEY_STORE) || "";
  }
  $("api-key").addEventListener("input", () => {
    const key = apiKey();
    if (key) sessionStorage.setItem(KEY_STORE, key);
    else sessionStorage.removeItem(KEY_STORE);
  });
  loadExamples()
    .catch((error) => setStatus(`The bundled examples could not be loaded (${error.message}); paste or open a request instead.`))
    .finally(() => document.body.setAttribute("data-ready", "true"));
}

if (window.Plotly) start();
else window.addEventListener("load", start);
