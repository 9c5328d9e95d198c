// The search page: talks to the same service's REST API (POST /search, GET /collections,
// GET /documents/{id}). No framework and nothing from outside this service.
//
// Untrusted text (passages, titles, sources) only ever reaches the page as text nodes
// (textContent / createTextNode); highlights are <mark> elements built around those nodes.
// Nothing from the service is ever parsed as HTML, so a passage holding markup shows as
// markup, never runs.
"use strict";

(function () {
  const KEY_STORE = "sounding.key";
  const RESULTS = 10;
  const PER_DOCUMENT = 3;
  // Words too common to be worth highlighting (a short English list; common practice).
  const STOPWORDS = new Set(
    ("a an and are as at be by can do does for from has have how i if in into is it its " +
     "me my no not of on or our so than that the their them then there these they this to " +
     "us was we what when where which who why will with you your").split(" ")
  );
  const WORD = /[\p{L}\p{N}]+/gu;

  const $ = (id) => document.getElementById(id);
  const el = {
    form: $("search"), q: $("q"), mode: $("mode"), collection: $("collection"),
    collectionLabel: $("collection-label"), keyToggle: $("key-toggle"),
    keyPanel: $("key-panel"), key: $("key"), keyForget: $("key-forget"),
    status: $("status"), error: $("error"), results: $("results"), list: $("result-list"),
    doc: $("document"), back: $("back"), docTitle: $("doc-title"), docMeta: $("doc-meta"),
    docChunks: $("doc-chunks"),
  };

  // ---- access key (sessionStorage: gone when the tab closes) ----

  function storedKey() {
    try { return sessionStorage.getItem(KEY_STORE) || ""; } catch (e) { return ""; }
  }

  function storeKey(value) {
    try {
      if (value) sessionStorage.setItem(KEY_STORE, value);
      else sessionStorage.removeItem(KEY_STORE);
    } catch (e) { /* storage refused (private mode): the key lives for this page only */ }
    memoryKey = value;
  }

  let memoryKey = storedKey();

  function showKeyPanel(show, focus) {
    el.keyPanel.hidden = !show;
    el.keyToggle.hidden = !show && !memoryKey;
    el.keyToggle.setAttribute("aria-expanded", String(show));
    if (show && focus) el.key.focus();
  }

  // ---- talking to the API ----

  class ApiError extends Error {
    constructor(status, detail) {
      super(detail);
      this.status = status;
      this.detail = detail;
    }
  }

  async function api(method, path, body) {
    const headers = { "Accept": "application/json" };
    if (body !== undefined) headers["Content-Type"] = "application/json";
    if (memoryKey) headers["Authorization"] = "Bearer " + memoryKey;
    let response;
    try {
      response = await fetch(path, {
        method, headers, body: body === undefined ? undefined : JSON.stringify(body),
        credentials: "omit", cache: "no-store",
      });
    } catch (e) {
      throw new ApiError(0, "");
    }
    let data = null;
    try { data = await response.json(); } catch (e) { data = null; }
    if (!response.ok) {
      const detail = data && typeof data.detail === "string" ? data.detail : "";
      throw new ApiError(response.status, detail);
    }
    return data;
  }

  function explain(err, what) {
    const detail = err.detail ? " (" + err.detail + ")" : "";
    switch (err.status) {
      case 0: return "Could not reach the search service. Check that it is running.";
      case 401: return memoryKey
        ? "The access key was not accepted. Enter a valid key below."
        : "This service needs an access key. Enter it below.";
      case 403: return "Your access key does not allow this" + detail + ".";
      case 404: return what === "document"
        ? "That document is not in the index, or your key may not read it."
        : "Not found" + detail + ".";
      case 413: return "The query is too long for the service.";
      case 422: return "The service could not take this query" + detail + ".";
      case 429: return "Too many requests; wait a moment and try again.";
      case 503: return "Search is not available right now" + detail + ".";
      default: return "The service answered with an error " + err.status + detail + ".";
    }
  }

  function report(err, what) {
    if (!(err instanceof ApiError)) throw err;
    if (err.status === 401) showKeyPanel(true, true);
    setBusy(false);
    el.status.textContent = "";
    el.error.textContent = explain(err, what);
    el.error.hidden = false;
  }

  function clearError() {
    el.error.hidden = true;
    el.error.textContent = "";
  }

  function setBusy(busy) {
    document.body.setAttribute("aria-busy", String(busy));
  }

  // ---- highlighting: split text into plain and matching runs, built as DOM nodes ----

  /** Words of the query worth highlighting, lower-cased, longest first. */
  function queryTerms(query) {
    const seen = new Set();
    for (const match of query.toLowerCase().matchAll(WORD)) {
      let word = match[0];
      if (STOPWORDS.has(word) || word.length < 2) continue;
      // "valves" should light up "valve": drop a plural s (matching is by word prefix).
      if (word.length > 3 && word.endsWith("s") && !word.endsWith("ss")) word = word.slice(0, -1);
      seen.add(word);
    }
    return [...seen].sort((a, b) => b.length - a.length);
  }

  /** Runs of ``text``: [{text, mark}], mark true for words starting with a query term. */
  function highlightRuns(text, terms) {
    const runs = [];
    let last = 0;
    if (terms.length) {
      for (const match of text.matchAll(WORD)) {
        const lower = match[0].toLowerCase();
        if (!terms.some((t) => lower.startsWith(t))) continue;
        if (match.index > last) runs.push({ text: text.slice(last, match.index), mark: false });
        runs.push({ text: match[0], mark: true });
        last = match.index + match[0].length;
      }
    }
    if (last < text.length) runs.push({ text: text.slice(last), mark: false });
    return runs;
  }

  function highlighted(tag, className, text, terms) {
    const node = document.createElement(tag);
    if (className) node.className = className;
    for (const run of highlightRuns(text, terms)) {
      if (run.mark) {
        const mark = document.createElement("mark");
        mark.textContent = run.text;
        node.appendChild(mark);
      } else {
        node.appendChild(document.createTextNode(run.text));
      }
    }
    return node;
  }

  function textNode(tag, className, text) {
    const node = document.createElement(tag);
    if (className) node.className = className;
    node.textContent = text;
    return node;
  }

  // ---- page state lives in the URL fragment, so Back and bookmarks work ----

  function readHash() {
    return new URLSearchParams(location.hash.replace(/^#/, ""));
  }

  function searchHash(query, mode, collection) {
    const p = new URLSearchParams({ q: query, mode });
    if (collection) p.set("collection", collection);
    return "#" + p.toString();
  }

  function documentHash(documentId, chunkId) {
    const p = new URLSearchParams({ doc: documentId });
    if (chunkId !== undefined && chunkId !== null) p.set("chunk", String(chunkId));
    return "#" + p.toString();
  }

  let lastSearchHash = "";
  let lastTerms = [];

  // ---- search ----

  async function runSearch(query, mode, collection) {
    clearError();
    setBusy(true);
    el.doc.hidden = true;
    el.status.textContent = "Searching…";
    const body = { query, k: RESULTS, mode, max_per_document: PER_DOCUMENT };
    if (collection) body.collections = [collection];
    let data;
    try {
      data = await api("POST", "/search", body);
    } catch (err) {
      report(err, "search");
      el.results.hidden = true;
      return;
    }
    lastTerms = queryTerms(query);
    renderResults(data.results || [], query);
    setBusy(false);
  }

  function renderResults(results, query) {
    el.list.replaceChildren();
    for (const r of results) {
      const item = document.createElement("li");
      item.className = "result";
      const heading = document.createElement("h2");
      const link = document.createElement("a");
      link.href = documentHash(r.document_id, r.chunk_id);
      link.textContent = r.title || r.document_id;
      link.className = "result-link";
      heading.appendChild(link);
      item.appendChild(heading);
      if (r.trail && r.trail.length) {
        item.appendChild(textNode("p", "trail", r.trail.join(" › ")));
      }
      item.appendChild(highlighted("p", "passage", r.text || "", lastTerms));
      const meta = document.createElement("p");
      meta.className = "meta";
      meta.appendChild(textNode("span", "score", "score " + Number(r.score).toFixed(3)));
      if (r.collection) meta.appendChild(textNode("span", "collection", r.collection));
      meta.appendChild(textNode("span", "source", r.source || r.document_id));
      if (r.page) meta.appendChild(textNode("span", "page", "page " + r.page));
      item.appendChild(meta);
      el.list.appendChild(item);
    }
    el.results.hidden = false;
    const n = results.length;
    el.status.textContent = n
      ? n + (n === 1 ? " passage" : " passages") + " for “" + query + "”"
      : "Nothing found for “" + query + "”. Try other words or the Meaning ranking.";
  }

  // ---- one document, scrolled to the passage ----

  function safeUrl(value) {
    // Only web links: a javascript: or data: URL from a document's metadata never becomes a link.
    if (typeof value !== "string") return null;
    try {
      const url = new URL(value, location.href);
      return url.protocol === "http:" || url.protocol === "https:" ? url.href : null;
    } catch (e) {
      return null;
    }
  }

  function documentPath(documentId) {
    // Ids are paths relative to the indexed folder: keep their slashes, escape the rest.
    return "/documents/" + documentId.split("/").map(encodeURIComponent).join("/");
  }

  async function showDocument(documentId, chunkId) {
    clearError();
    setBusy(true);
    el.status.textContent = "Opening the document…";
    let doc;
    try {
      doc = await api("GET", documentPath(documentId));
    } catch (err) {
      report(err, "document");
      return;
    }
    el.results.hidden = true;
    el.back.href = lastSearchHash || "#";
    el.back.textContent = lastSearchHash ? "← Back to results" : "← New search";
    el.docTitle.textContent = doc.title || doc.id;
    el.docMeta.replaceChildren();
    const addMeta = (label, value) => {
      el.docMeta.appendChild(textNode("dt", "", label));
      const dd = document.createElement("dd");
      if (value instanceof Node) dd.appendChild(value); else dd.textContent = value;
      el.docMeta.appendChild(dd);
    };
    if (doc.collection) addMeta("Collection", doc.collection);
    addMeta("Source", doc.source || doc.id);
    const original = safeUrl(doc.metadata && doc.metadata.url);
    if (original) {
      const a = document.createElement("a");
      a.href = original;
      a.textContent = original;
      a.rel = "noopener noreferrer";
      a.id = "original";
      addMeta("Original", a);
    }
    el.docChunks.replaceChildren();
    let target = null;
    for (const c of doc.chunks || []) {
      const section = document.createElement("section");
      section.className = "chunk";
      section.id = "chunk-" + c.chunk_id;
      if (c.trail && c.trail.length) {
        section.appendChild(textNode("h3", "trail", c.trail.join(" › ")));
      }
      section.appendChild(highlighted("p", "passage", c.text || "", lastTerms));
      if (c.page) section.appendChild(textNode("p", "meta", "page " + c.page));
      if (String(c.chunk_id) === chunkId) {
        section.classList.add("target");
        section.tabIndex = -1;
        section.setAttribute("aria-label", "The passage found");
        target = section;
      }
      el.docChunks.appendChild(section);
    }
    el.doc.hidden = false;
    el.status.textContent = "Document: " + (doc.title || doc.id);
    setBusy(false);
    const focus = target || el.doc;
    focus.focus({ preventScroll: true });
    focus.scrollIntoView({ block: target ? "center" : "start" });
  }

  // ---- collections for the filter ----

  async function loadCollections() {
    let data;
    try {
      data = await api("GET", "/collections");
    } catch (err) {
      if (err instanceof ApiError && err.status === 401) {
        // Nothing can be searched without a key: move there, unless the person is typing.
        const typing = document.activeElement === el.q && el.q.value !== "";
        showKeyPanel(true, !typing);
      }
      return;  // the filter stays hidden; searching still works across everything visible
    }
    const chosen = el.collection.value || readHash().get("collection") || "";
    el.collection.replaceChildren(new Option("All collections", ""));
    for (const c of (data && data.collections) || []) {
      const label = c.name + (typeof c.documents === "number" ? " (" + c.documents + ")" : "");
      el.collection.appendChild(new Option(label, c.name));
    }
    el.collection.value = chosen;
    if (el.collection.value !== chosen) el.collection.value = "";
    el.collectionLabel.hidden = el.collection.options.length <= 2;
  }

  // ---- routing ----

  function route() {
    const p = readHash();
    if (p.has("doc")) {
      showDocument(p.get("doc"), p.get("chunk"));
      return;
    }
    const query = (p.get("q") || "").trim();
    if (!query) {
      el.results.hidden = true;
      el.doc.hidden = true;
      el.status.textContent = "";
      return;
    }
    el.q.value = query;
    const mode = p.get("mode");
    if (mode && [...el.mode.options].some((o) => o.value === mode)) el.mode.value = mode;
    if (p.has("collection")) el.collection.value = p.get("collection");
    lastSearchHash = location.hash;
    runSearch(query, el.mode.value, el.collection.value);
  }

  el.form.addEventListener("submit", (event) => {
    event.preventDefault();
    const query = el.q.value.trim();
    if (!query) { el.q.focus(); return; }
    const hash = searchHash(query, el.mode.value, el.collection.value);
    if (location.hash === hash) route(); else location.hash = hash;
  });

  el.keyPanel.addEventListener("submit", (event) => {
    event.preventDefault();
    storeKey(el.key.value.trim());
    el.key.value = "";
    showKeyPanel(false, false);
    clearError();
    el.status.textContent = memoryKey ? "Key saved for this tab." : "";
    loadCollections();
    if (el.q.value.trim()) route();
    el.q.focus();
  });

  el.keyForget.addEventListener("click", () => {
    storeKey("");
    el.key.value = "";
    el.status.textContent = "Key forgotten.";
    showKeyPanel(true, true);
  });

  el.keyToggle.addEventListener("click", () => showKeyPanel(el.keyPanel.hidden, true));

  window.addEventListener("hashchange", route);

  showKeyPanel(false, false);
  loadCollections();
  route();
  if (!readHash().has("doc")) el.q.focus();

  // For tests and the curious: the pure highlighting step.
  window.soundingPage = { queryTerms, highlightRuns };
})();
