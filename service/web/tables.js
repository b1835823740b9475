// Labelled tables of matrices, shaded by the size of each entry.

/** A number as shown on the page: six significant digits, exponent form when very large or small. */
export function fmt(value, digits = 6) {
  if (value === null || value === undefined) return "—";
  if (typeof value !== "number") return String(value);
  if (!Number.isFinite(value)) return String(value);
  if (value === 0) return "0";
  const size = Math.abs(value);
  if (size >= 1e6 || size < 1e-4) return value.toExponential(digits - 1);
  return String(Number(value.toPrecision(digits)));
}

function element(tag, attributes = {}, text = undefined) {
  const node = document.createElement(tag);
  for (const [name, value] of Object.entries(attributes)) node.setAttribute(name, value);
  if (text !== undefined) node.textContent = text;
  return node;
}

/**
 * A matrix as a table: rows and columns named by their tags, each cell shaded in
 * proportion to |entry| / max |entry| of the table, the largest ones also in bold.
 */
export function matrixTable({ id, caption, rows, columns, values, corner = "" }) {
  const wrap = element("div", { class: "table-wrap" });
  const table = element("table", { id, "data-testid": `table-${id}` });
  table.append(element("caption", {}, caption));
  let largest = 0;
  for (const row of values) for (const v of row) if (typeof v === "number" && Number.isFinite(v)) largest = Math.max(largest, Math.abs(v));
  const head = element("tr");
  head.append(element("th", { scope: "col" }, corner));
  columns.forEach((name, j) => head.append(element("th", { scope: "col" }, name ?? `column ${j + 1}`)));
  const thead = element("thead");
  thead.append(head);
  const tbody = element("tbody");
  values.forEach((row, i) => {
    const tr = element("tr");
    tr.append(element("th", { scope: "row" }, rows[i] ?? `row ${i + 1}`));
    row.forEach((v, j) => {
      const td = element("td", { "data-row": String(i), "data-col": String(j), "data-value": v === null ? "null" : String(v) }, fmt(v));
      if (typeof v === "number" && largest > 0) {
        const share = Math.abs(v) / largest;
        td.style.background = `rgba(0, 114, 178, ${(0.55 * share).toFixed(3)})`;
        if (share >= 0.5) td.classList.add("big");
        td.title = `${rows[i] ?? ""} / ${columns[j] ?? ""}: ${v} (${(100 * share).toFixed(0)} % of the largest entry)`;
      }
      tr.append(td);
    });
    tbody.append(tr);
  });
  table.append(thead, tbody);
  wrap.append(table);
  return wrap;
}

/** A plain table of records: columns is a list of [heading, function of a record]. */
export function recordTable({ id, caption, columns, records, highlight = () => false }) {
  const wrap = element("div", { class: "table-wrap" });
  const table = element("table", { id });
  table.append(element("caption", {}, caption));
  const head = element("tr");
  for (const [heading] of columns) head.append(element("th", { scope: "col" }, heading));
  const thead = element("thead");
  thead.append(head);
  const tbody = element("tbody");
  for (const record of records) {
    const tr = element("tr");
    if (highlight(record)) tr.classList.add("chosen");
    for (const [, get] of columns) {
      const v = get(record);
      const td = element("td", typeof v === "number" ? { "data-value": String(v) } : {}, typeof v === "number" ? fmt(v) : v ?? "—");
      if (typeof v !== "number") td.style.textAlign = "left";
      tr.append(td);
    }
    tbody.append(tr);
  }
  table.append(thead, tbody);
  wrap.append(table);
  return wrap;
}
