// How the search page lays out clean text from the service, with text nodes only:
// paragraphs and list items one a line, blank lines between blocks, table rows one a
// line with tab-separated cells. Highlights are [start, end) spans the service computed
// with the lexical ranking's own tokenizer; "found" is the passage's span in a document.
// Nothing here parses HTML: every piece of text becomes a text node.
"use strict";

window.soundingRender = (function () {
  const CELL_LINE = /[^\t\n]\t/;

  /** Append text[start:end) to parent as text nodes, <mark>s and <span class="found">s. */
  function appendRange(parent, text, start, end, marks, found, firstFound) {
    const cuts = new Set([start, end]);
    for (const [a, b] of marks) { if (b > start && a < end) { cuts.add(Math.max(a, start)); cuts.add(Math.min(b, end)); } }
    if (found && found[1] > start && found[0] < end) {
      cuts.add(Math.max(found[0], start));
      cuts.add(Math.min(found[1], end));
    }
    const points = [...cuts].sort((x, y) => x - y);
    for (let i = 0; i + 1 < points.length; i++) {
      const a = points[i], b = points[i + 1];
      if (b <= a) continue;
      const piece = text.slice(a, b);
      const marked = marks.some(([ma, mb]) => ma <= a && b <= mb);
      const inFound = found && found[0] <= a && b <= found[1];
      let node = document.createTextNode(piece);
      if (marked) {
        const mark = document.createElement("mark");
        mark.appendChild(node);
        node = mark;
      }
      if (inFound) {
        const span = document.createElement("span");
        span.className = "found";
        span.appendChild(node);
        node = span;
        if (!firstFound.node) firstFound.node = span;
      }
      parent.appendChild(node);
    }
  }

  /** Lines of text[start:end) as [lineStart, lineEnd] pairs. */
  function lines(text, start, end) {
    const out = [];
    let a = start;
    while (a <= end) {
      let b = text.indexOf("\n", a);
      if (b < 0 || b > end) b = end;
      out.push([a, b]);
      a = b + 1;
    }
    return out;
  }

  /** Spans from the service count code points; JavaScript strings count UTF-16 units. */
  function toUnits(text, spans) {
    if (!/[\uD800-\uDFFF]/.test(text)) return spans;
    const units = [0];
    for (const ch of text) units.push(units[units.length - 1] + ch.length);
    const at = (i) => units[Math.min(i, units.length - 1)];
    return spans.map(([a, b]) => [at(a), at(b)]);
  }

  /** A container of text's blocks (paragraphs, lists, tables), built from text nodes only. */
  function renderText(className, text, marks, found) {
    marks = toUnits(text, marks);
    if (found) found = toUnits(text, [found])[0];
    const box = document.createElement("div");
    box.className = className;
    const firstFound = { node: null };
    const blockRe = /\n[ \t]*\n/g;
    let pos = 0;
    const blocks = [];
    for (const m of text.matchAll(blockRe)) { blocks.push([pos, m.index]); pos = m.index + m[0].length; }
    blocks.push([pos, text.length]);
    for (const [start, end] of blocks) {
      if (end <= start) continue;
      const rows = lines(text, start, end);
      const cellRows = rows.filter(([a, b]) => CELL_LINE.test(text.slice(a, b))).length;
      let block;
      if (cellRows * 2 > rows.length) {
        block = document.createElement("table");
        const body = document.createElement("tbody");
        for (const [a, b] of rows) {
          const tr = document.createElement("tr");
          let c = a;
          for (const cell of text.slice(a, b).split("\t")) {
            const td = document.createElement("td");
            appendRange(td, text, c, c + cell.length, marks, found, firstFound);
            tr.appendChild(td);
            c += cell.length + 1;
          }
          body.appendChild(tr);
        }
        block.appendChild(body);
      } else {
        block = document.createElement("p");
        appendRange(block, text, start, end, marks, found, firstFound);
      }
      if (found && found[1] > start && found[0] < end) block.classList.add("has-found");
      box.appendChild(block);
    }
    return { box, found: firstFound.node };
  }

  return { renderText };
})();
