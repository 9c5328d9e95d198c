// The search page: talks to the same service's REST API (POST /search, GET /collections,
// GET /documents/{id}). No framework and nothing from outside this service.
//
// Untrusted text (passages, titles, sources) only ever reaches the page as text nodes
// (textContent / createTextNode); highlights, tables and the passage found are elements
// built around those nodes.
// Nothing from the service is ever parsed as HTML, so a passage holding markup shows as
// markup, never runs.
"use strict";

(function () {
  const KEY_STORE = "sounding.key";
  const RESULTS = 10;
  const PER_DOCUMENT = 3;

  const $ = (id) => document.getElementById(id);
  const el = {
    form: $("search"), q: $("q"), mode: $("mode"), collection: $("collection"),
    collectionLabel: $("collection-label"), keyToggle: $("key-toggle"),
    keyPanel: $("key-panel"), key: $("key"), keyForget: $("key-forget"),
    status: $("status"), error: $("error"), results: $("results"), list: $("result-list"),
    doc: $("document"), back: $("back"), docTitle: $("doc-title"), docMeta: $("doc-meta"),
    docChunks: $("doc-chunks"), activeTags: $("active-tags"),
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
        ? "The access key was not accepted. Enter a valid key in the Access key field."
        : "This service needs an access key. Enter it in the Access key field.";
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

  const renderText = window.soundingRender.renderText;

  function textNode(tag, className, text) {
    const node = document.createElement(tag);
    if (className) node.className = className;
    node.textContent = text;
    return node;
  }

  function isoDate(seconds) {
    const n = Number(seconds);
    if (!Number.isFinite(n) || n <= 0) return "";
    return new Date(n * 1000).toISOString().slice(0, 10);
  }

  function dateNode(seconds) {
    const day = isoDate(seconds);
    if (!day) return null;
    const node = textNode("time", "date", day);
    node.dateTime = day;
    return node;
  }

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

  function originalLink(url, id) {
    const href = safeUrl(url);
    if (!href) return null;
    const a = document.createElement("a");
    a.href = href;
    a.textContent = "Open the original";
    a.rel = "noopener noreferrer";
    a.className = "original";
    if (id) a.id = id;
    return a;
  }

  // ---- page state lives in the URL fragment, so Back, bookmarks and new tabs work ----
  // q, mode, collection, tag (repeated), and for a document view doc and chunk as well.

  function readHash() {
    return new URLSearchParams(location.hash.replace(/^#/, ""));
  }

  function readState() {
    const p = readHash();
    const mode = p.get("mode");
    return {
      q: (p.get("q") || "").trim(),
      mode: [...el.mode.options].some((o) => o.value === mode) ? mode : "hybrid",
      collection: p.get("collection") || "",
      tags: [...new Set(p.getAll("tag").filter(Boolean))],
      doc: p.get("doc"),
      chunk: p.get("chunk"),
    };
  }

  function stateHash(state) {
    const p = new URLSearchParams();
    if (state.q) { p.set("q", state.q); p.set("mode", state.mode); }
    if (state.collection) p.set("collection", state.collection);
    for (const tag of state.tags || []) p.append("tag", tag);
    if (state.doc) p.set("doc", state.doc);
    if (state.doc && state.chunk !== undefined && state.chunk !== null) p.set("chunk", String(state.chunk));
    return "#" + p.toString();
  }

  function go(state) {
    const hash = stateHash(state);
    if (location.hash === hash) route(); else location.hash = hash;
  }

  let current = readState();

  // ---- search ----

  async function runSearch(state) {
    clearError();
    setBusy(true);
    el.doc.hidden = true;
    el.status.textContent = "Searching…";
    const body = { query: state.q, k: RESULTS, mode: state.mode, max_per_document: PER_DOCUMENT };
    if (state.collection) body.collections = [state.collection];
    if (state.tags.length) body.tags = state.tags;
    let data;
    try {
      data = await api("POST", "/search", body);
    } catch (err) {
      report(err, "search");
      el.results.hidden = true;
      return;
    }
    renderResults(data.results || [], state);
    setBusy(false);
  }

  function renderActiveTags(state) {
    el.activeTags.replaceChildren();
    el.activeTags.hidden = !state.tags.length;
    if (!state.tags.length) return;
    el.activeTags.appendChild(textNode("span", "label", "Only tagged: "));
    for (const tag of state.tags) {
      const b = textNode("button", "tag active", tag + " ×");
      b.type = "button";
      b.setAttribute("aria-label", "Remove the tag filter " + tag);
      b.addEventListener("click", () => go({ ...state, doc: null, tags: state.tags.filter((t) => t !== tag) }));
      el.activeTags.appendChild(b);
    }
  }

  function tagButtons(tags, state) {
    const list = document.createElement("ul");
    list.className = "tags";
    list.setAttribute("aria-label", "Tags");
    for (const tag of tags || []) {
      const item = document.createElement("li");
      const b = textNode("button", "tag", tag);
      b.type = "button";
      b.title = "Only results tagged " + tag;
      b.addEventListener("click", () => {
        const tagsNow = state.tags.includes(tag) ? state.tags : [...state.tags, tag];
        go({ ...state, doc: null, chunk: null, tags: tagsNow, q: state.q || el.q.value.trim() });
      });
      item.appendChild(b);
      list.appendChild(item);
    }
    return list;
  }

  function renderResults(results, state) {
    renderActiveTags(state);
    el.list.replaceChildren();
    const top = Math.max(0, ...results.map((r) => Number(r.score) || 0));
    results.forEach((r, i) => {
      const item = document.createElement("li");
      item.className = "result";
      const heading = document.createElement("h2");
      heading.appendChild(textNode("span", "rank", (i + 1) + "."));
      const link = document.createElement("a");
      link.href = stateHash({ ...state, doc: r.document_id, chunk: r.chunk_id });
      link.textContent = r.title || r.document_id;
      link.className = "result-link";
      heading.appendChild(link);
      item.appendChild(heading);
      if (r.trail && r.trail.length) {
        item.appendChild(textNode("p", "trail", r.trail.join(" › ")));
      }
      item.appendChild(renderText("passage", r.text || "", r.highlights || [], null).box);
      const meta = document.createElement("div");
      meta.className = "meta";
      // Raw scores (RRF, BM25, cosine) mean nothing to a reader: order, and a bar
      // relative to the top result. The API keeps the scores.
      const strength = top > 0 ? Math.max(0, Number(r.score) || 0) / top : 0;
      const meter = document.createElement("meter");
      meter.className = "strength";
      meter.min = 0; meter.max = 1; meter.value = strength;
      const pct = Math.round(strength * 100);
      meter.title = "Match strength: " + pct + "% of the top result";
      meter.setAttribute("aria-label", "Match strength " + pct + "% of the top result");
      meter.textContent = pct + "%";
      meta.appendChild(meter);
      const date = dateNode(r.modified);
      if (date) meta.appendChild(date);
      if (r.collection) meta.appendChild(textNode("span", "collection", r.collection));
      meta.appendChild(textNode("span", "source", r.source || r.document_id));
      if (r.page) meta.appendChild(textNode("span", "page", "page " + r.page));
      const original = originalLink(r.url);
      if (original) meta.appendChild(original);
      item.appendChild(meta);
      if (r.tags && r.tags.length) item.appendChild(tagButtons(r.tags, state));
      el.list.appendChild(item);
    });
    el.results.hidden = false;
    const n = results.length;
    const narrowed = state.tags.length ? " tagged " + state.tags.join(" or ") : "";
    el.status.textContent = n
      ? n + (n === 1 ? " passage" : " passages") + " for “" + state.q + "”" + narrowed
      : "Nothing found for “" + state.q + "”" + narrowed + ". Try other words or the Meaning ranking.";
  }

  // ---- one document: its text once, the passage found marked and scrolled to ----

  function documentPath(documentId, query) {
    // Ids are paths relative to the indexed folder: keep their slashes, escape the rest.
    const path = "/documents/" + documentId.split("/").map(encodeURIComponent).join("/");
    return query ? path + "?" + new URLSearchParams({ highlight: query }).toString() : path;
  }

  function documentSections(doc) {
    if (Array.isArray(doc.sections) && doc.sections.length) return doc.sections;
    // An older service: one section per chunk.
    return (doc.chunks || []).map((c) => ({
      trail: c.trail, page: c.page, text: c.text || "", highlights: [],
      chunks: [{ chunk_id: c.chunk_id, start: 0, end: (c.text || "").length }],
    }));
  }

  async function showDocument(state) {
    clearError();
    setBusy(true);
    el.status.textContent = "Opening the document…";
    let doc;
    try {
      doc = await api("GET", documentPath(state.doc, state.q));
    } catch (err) {
      report(err, "document");
      return;
    }
    el.results.hidden = true;
    const back = { ...state, doc: null, chunk: null };
    el.back.href = stateHash(back);
    el.back.textContent = state.q ? "← Back to results" : "← New search";
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
    const date = dateNode(doc.modified);
    if (date) addMeta("Modified", date);
    if (doc.tags && doc.tags.length) addMeta("Tags", tagButtons(doc.tags, back));
    const original = originalLink(doc.url || (doc.metadata && doc.metadata.url), "original");
    if (original) addMeta("Original", original);
    el.docChunks.replaceChildren();
    let target = null;
    let lastTrail = null;
    for (const s of documentSections(doc)) {
      const section = document.createElement("section");
      section.className = "doc-section";
      const trail = (s.trail || []).join(" › ");
      if (trail && trail !== lastTrail) section.appendChild(textNode("h3", "trail", trail));
      lastTrail = trail;
      if (s.page) section.appendChild(textNode("p", "meta page", "page " + s.page));
      const span = (s.chunks || []).find((c) => String(c.chunk_id) === String(state.chunk));
      const rendered = renderText("text", s.text || "", s.highlights || [], span ? [span.start, span.end] : null);
      section.appendChild(rendered.box);
      if (rendered.found && !target) {
        target = rendered.found;
        target.id = "found";
        target.tabIndex = -1;
        target.setAttribute("aria-label", "The passage found");
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
    const chosen = readState().collection || el.collection.value || "";
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

  /** Put the state's query, ranking and collection in the form, so a bookmark shows them. */
  function fillForm(state) {
    el.q.value = state.q;
    el.mode.value = state.mode;
    if ([...el.collection.options].some((o) => o.value === state.collection)) {
      el.collection.value = state.collection;
    }
  }

  function route() {
    const state = readState();
    current = state;
    fillForm(state);
    if (state.doc) {
      showDocument(state);
      return;
    }
    if (!state.q) {
      el.results.hidden = true;
      el.doc.hidden = true;
      el.status.textContent = "";
      return;
    }
    runSearch(state);
  }

  el.form.addEventListener("submit", (event) => {
    event.preventDefault();
    const query = el.q.value.trim();
    if (!query) { el.q.focus(); return; }
    // A new query keeps the tag filter; another collection or ranking is part of it.
    go({ q: query, mode: el.mode.value, collection: el.collection.value, tags: current.tags });
  });

  el.keyPanel.addEventListener("submit", (event) => {
    event.preventDefault();
    storeKey(el.key.value.trim());
    el.key.value = "";
    showKeyPanel(false, false);
    clearError();
    el.status.textContent = memoryKey ? "Key saved for this tab." : "";
    loadCollections();
    // Whatever the address holds (a search, a document, filters) now that the key is here.
    route();
    if (!readState().doc) el.q.focus();
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
})();
