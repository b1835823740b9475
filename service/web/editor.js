// The request editor: a plain textarea, and a notes column beside it that shows each
// problem of the service's answer on the line of the field its JSON pointer names.

/** JSON laid out for reading: nested objects indented, arrays of numbers kept on one line. */
export function prettyJson(value, indent = "") {
  const inner = `${indent}  `;
  if (Array.isArray(value)) {
    if (!value.length) return "[]";
    if (value.every((v) => v === null || typeof v !== "object")) return `[${value.map((v) => JSON.stringify(v)).join(", ")}]`;
    return `[\n${value.map((v) => inner + prettyJson(v, inner)).join(",\n")}\n${indent}]`;
  }
  if (value && typeof value === "object") {
    const keys = Object.keys(value);
    if (!keys.length) return "{}";
    return `{\n${keys.map((k) => `${inner}${JSON.stringify(k)}: ${prettyJson(value[k], inner)}`).join(",\n")}\n${indent}}`;
  }
  return JSON.stringify(value);
}

/** Map every JSON pointer of a valid JSON text to the offsets of its value (and key). */
export function locateFields(text) {
  const found = new Map();
  let i = 0;
  const space = () => {
    while (i < text.length && " \t\r\n".includes(text[i])) i += 1;
  };
  const string = () => {
    const start = i;
    i += 1;
    while (i < text.length && text[i] !== '"') i += text[i] === "\\" ? 2 : 1;
    i += 1;
    return JSON.parse(text.slice(start, i));
  };
  const escape = (key) => key.replace(/~/g, "~0").replace(/\//g, "~1");
  const value = (pointer) => {
    space();
    const start = i;
    const c = text[i];
    if (c === "{") {
      i += 1;
      space();
      if (text[i] === "}") i += 1;
      else {
        for (;;) {
          space();
          const keyStart = i;
          const key = string();
          space();
          i += 1; // the colon
          const child = `${pointer}/${escape(key)}`;
          value(child);
          found.get(child).keyStart = keyStart;
          space();
          if (text[i] === ",") { i += 1; continue; }
          i += 1; // the closing brace
          break;
        }
      }
    } else if (c === "[") {
      i += 1;
      space();
      if (text[i] === "]") i += 1;
      else {
        for (let index = 0; ; index += 1) {
          value(`${pointer}/${index}`);
          space();
          if (text[i] === ",") { i += 1; continue; }
          i += 1;
          break;
        }
      }
    } else if (c === '"') {
      string();
    } else {
      while (i < text.length && /[-+0-9.eEa-z]/.test(text[i])) i += 1;
    }
    found.set(pointer, { start, end: i });
  };
  value("");
  return found;
}

/** The offset where a pointer's field is written, or its nearest written ancestor's. */
export function placeOf(fields, pointer) {
  let p = pointer === "/" ? "" : pointer;
  let missing = false;
  while (!fields.has(p)) {
    missing = true;
    const cut = p.lastIndexOf("/");
    if (cut < 0) { p = ""; break; }
    p = p.slice(0, cut);
  }
  const field = fields.get(p) || { start: 0, end: 0 };
  return { offset: field.keyStart ?? field.start, end: field.end, found: p, missing };
}

export function lineOf(text, offset) {
  let line = 0;
  for (let k = 0; k < offset && k < text.length; k += 1) if (text[k] === "\n") line += 1;
  return line;
}

/** The offset a JSON.parse error message names, when it names one. */
export function syntaxErrorOffset(text, message) {
  const position = /position (\d+)/.exec(message);
  if (position) return Number(position[1]);
  const lineColumn = /line (\d+) column (\d+)/.exec(message);
  if (lineColumn) {
    const lines = text.split("\n");
    let offset = 0;
    for (let k = 0; k < Number(lineColumn[1]) - 1 && k < lines.length; k += 1) offset += lines[k].length + 1;
    return offset + Number(lineColumn[2]) - 1;
  }
  return firstBadOffset(text);
}

/** Where JSON text first goes wrong, for a parser message that gives no position.
 *
 * A prefix of valid JSON fails only for ending early; once a prefix holds the error, every
 * longer one fails for it too.  So the shortest prefix that fails for another reason ends
 * just after the error, found by bisection (about log2 of the length parses). */
function firstBadOffset(text) {
  const early = (prefix) => {
    try {
      JSON.parse(prefix);
      return true;
    } catch (error) {
      const message = String(error.message);
      const at = /position (\d+)/.exec(message);
      // ending early: said in words, or placed at the very end of the prefix
      return /end of (json )?(input|data)|unterminated|unexpected end/i.test(message) || (at !== null && Number(at[1]) >= prefix.length);
    }
  };
  if (early(text)) return text.length;
  let good = 0;
  let bad = text.length;
  while (bad - good > 1) {
    const middle = Math.floor((good + bad) / 2);
    if (early(text.slice(0, middle))) good = middle;
    else bad = middle;
  }
  return bad - 1;
}

export class Editor {
  constructor(textarea, notes) {
    this.textarea = textarea;
    this.notes = notes;
    this.marks = [];
    textarea.addEventListener("scroll", () => this.layout());
    new ResizeObserver(() => this.layout()).observe(textarea);
  }

  get text() { return this.textarea.value; }

  set text(value) {
    this.textarea.value = value;
    this.clear();
  }

  clear() {
    this.marks = [];
    this.notes.replaceChildren();
  }

  /** Show problems beside their lines; each entry is {pointer, detail, offset?}. */
  mark(problems) {
    this.clear();
    const text = this.text;
    let fields = null;
    try { JSON.parse(text); fields = locateFields(text); } catch { fields = null; }
    for (const problem of problems) {
      let place;
      if (problem.offset !== undefined || !fields) place = { offset: problem.offset ?? 0, end: problem.offset ?? 0, missing: false };
      else place = placeOf(fields, problem.pointer);
      const line = lineOf(text, place.offset);
      const note = document.createElement("p");
      note.className = "note";
      note.dataset.pointer = problem.pointer;
      note.dataset.line = String(line + 1);
      const where = document.createElement("span");
      where.className = "where";
      where.textContent = `line ${line + 1}${place.missing ? " (field missing here)" : ""}: `;
      note.append(where, document.createTextNode(problem.detail));
      this.notes.append(note);
      this.marks.push({ note, line, offset: place.offset, end: place.end, pointer: problem.pointer });
    }
    this.layout();
    return this.marks;
  }

  layout() {
    const style = getComputedStyle(this.textarea);
    const lineHeight = parseFloat(style.lineHeight);
    const top = parseFloat(style.paddingTop);
    let lastBottom = -Infinity;
    const sorted = [...this.marks].sort((a, b) => a.line - b.line);
    for (const mark of sorted) {
      let y = top + mark.line * lineHeight - this.textarea.scrollTop;
      if (y < lastBottom) y = lastBottom; // two problems on one line: stack them
      mark.note.style.top = `${y}px`;
      lastBottom = y + mark.note.offsetHeight;
    }
  }

  /** Put the caret on a problem's field and bring it into view. */
  reveal(pointer) {
    const mark = this.marks.find((m) => m.pointer === pointer);
    if (!mark) return;
    this.textarea.focus();
    this.textarea.setSelectionRange(mark.offset, Math.max(mark.offset, mark.end));
    const lineHeight = parseFloat(getComputedStyle(this.textarea).lineHeight);
    this.textarea.scrollTop = Math.max(0, mark.line * lineHeight - this.textarea.clientHeight / 3);
    this.layout();
  }
}
