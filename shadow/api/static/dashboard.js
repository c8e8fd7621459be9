// shadow dashboard: fills the pages from the read-only JSON API and draws the plots as inline SVG.
// Plain JavaScript, no framework and nothing fetched from outside the service. Data is always put into
// the page as text (textContent), never as HTML.
//
// Signing in, when the service requires bearer tokens (shadow/api/security.py says why it is done so):
// on a 401 the page draws a token field; the token is tried on the API, kept in this tab's
// sessionStorage only, and sent as "Authorization: Bearer" on this script's own requests. It never goes
// into a URL, a cookie, localStorage or the console; "sign out" forgets it.
"use strict";

(() => {
  // The SVG namespace name: an identifier for createElementNS, never fetched.
  const SVG_NS = "http://www.w3.org/2000/svg";
  const API = "/api/v1";

  // ---- states: word + shape + colour class ---------------------------------------------------
  const STATES = {
    steady: { cls: "state-steady", rank: 0, shape: "circle", word: "steady" },
    "no data": { cls: "state-no-data", rank: 1, shape: "ring", word: "no data" },
    watch: { cls: "state-watch", rank: 2, shape: "triangle", word: "watch" },
    act: { cls: "state-act", rank: 3, shape: "diamond", word: "act" },
  };
  const NOT_ASSESSED = { cls: "state-unknown", rank: -1, shape: "ring", word: "not assessed" };
  const stateOf = (name) => (name == null ? NOT_ASSESSED : STATES[name] || { ...NOT_ASSESSED, word: String(name) });

  // ---- series look: colour and dash pattern per actuator, so lines differ by more than colour ----
  const COLOURS = ["#124e8c", "#c2410c", "#0f766e", "#7c3aed", "#8a5a00", "#be185d", "#334155", "#15803d"];
  const DASHES = ["", "7 3", "2 3", "9 3 2 3", "1 2", "12 4 4 4", "5 5", "3 6"];
  const look = (i) => ({ colour: COLOURS[i % COLOURS.length], dash: DASHES[i % DASHES.length] });

  // ---- small DOM helpers ----------------------------------------------------------------------
  function el(tag, attrs, ...children) {
    const node = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v == null || v === false) continue;
      if (k === "text") node.textContent = v;
      else if (k === "cls") node.className = v;
      else node.setAttribute(k, v === true ? "" : String(v));
    }
    for (const c of children.flat()) {
      if (c == null) continue;
      node.append(c instanceof Node ? c : document.createTextNode(String(c)));
    }
    return node;
  }

  function sv(tag, attrs, ...children) {
    const node = document.createElementNS(SVG_NS, tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v == null || v === "") continue;
      if (k === "text") node.textContent = v;
      else node.setAttribute(k, String(v));
    }
    for (const c of children.flat()) if (c != null) node.append(c);
    return node;
  }

  class ApiProblem extends Error {}
  class SignInNeeded extends ApiProblem {}

  // ---- the bearer token: this tab's sessionStorage, nowhere else ------------------------------
  const TOKEN_KEY = "shadow.bearer-token";
  function storedToken() {
    try {
      return window.sessionStorage.getItem(TOKEN_KEY) || "";
    } catch (_) {
      return ""; // storage refused (privacy settings): every request goes without a token
    }
  }
  function keepToken(token) {
    try {
      if (token) window.sessionStorage.setItem(TOKEN_KEY, token);
      else window.sessionStorage.removeItem(TOKEN_KEY);
    } catch (_) {
      /* nothing kept: the person signs in again on the next page */
    }
  }

  function request(url, token) {
    const headers = { accept: "application/json" };
    if (token) headers.authorization = `Bearer ${token}`;
    // same origin only (the API serves the page), no cookie, no referrer: the header is the only credential
    return fetch(url, { cache: "no-store", headers, credentials: "omit", referrerPolicy: "no-referrer" });
  }

  async function getJson(url) {
    let answer;
    const token = storedToken();
    try {
      answer = await request(url, token);
    } catch (err) {
      throw new ApiProblem(`the service did not answer (${err.message})`);
    }
    if (answer.status === 401) {
      if (token) keepToken(""); // refused now (withdrawn or replaced): forget it
      throw new SignInNeeded(token ? "the service no longer accepts the token of this tab" : "");
    }
    let body = null;
    try {
      body = await answer.json();
    } catch (_) {
      body = null;
    }
    if (!answer.ok) {
      const detail = body && body.detail ? body.detail : answer.statusText;
      const problem = new ApiProblem(`${answer.status} ${detail}`);
      problem.status = answer.status;
      throw problem;
    }
    return body;
  }

  // Follow next_offset for the paged series routes, up to maxPages pages.
  async function getAllPoints(url, maxPages = 5) {
    let points = [];
    let offset = 0;
    for (let k = 0; k < maxPages && offset != null; k += 1) {
      const body = await getJson(`${url}&offset=${offset}`);
      points = points.concat(body.points);
      offset = body.page.next_offset;
    }
    return points;
  }

  // ---- state badge ----------------------------------------------------------------------------
  function shapeOf(kind) {
    switch (kind) {
      case "circle":
        return sv("circle", { cx: 8, cy: 8, r: 6.5, fill: "#fff" });
      case "triangle":
        return sv("path", { d: "M8 1.2 L15 14.6 L1 14.6 Z", fill: "#fff" });
      case "diamond": // a diamond with a notch: reads as "stop and look" without a colour
        return sv("path", { d: "M8 0.5 L15.5 8 L8 15.5 L0.5 8 Z M7 4 L9 4 L8.6 9.5 L7.4 9.5 Z M7 11 L9 11 L9 13 L7 13 Z", fill: "#fff", "fill-rule": "evenodd" });
      default:
        return sv("circle", { cx: 8, cy: 8, r: 5.5, fill: "none", stroke: "currentColor", "stroke-width": 2.4 });
    }
  }

  function badge(stateName) {
    const s = stateOf(stateName);
    const icon = sv("svg", { viewBox: "0 0 16 16", "aria-hidden": "true", class: `shape-${s.shape}` }, shapeOf(s.shape));
    return el("span", { cls: `badge ${s.cls}`, "data-state": s.word }, icon, el("span", { text: s.word }));
  }

  // ---- figures: units come from the key's suffix ----------------------------------------------
  // [suffix, unit shown, scale]; the longest matching suffix wins.
  const SUFFIXES = [
    ["_n_s_m", "N·s/m", 1],
    ["_nm_s_rad", "N·m·s/rad", 1],
    ["_rad_s", "rad/s", 1],
    ["_m_s", "m/s", 1],
    ["_fraction", "%", 100],
    ["_percent", "%", 1],
    ["_ratio", "×", 1],
    ["_count", "", 1],
    ["_days", "d", 1],
    ["_hours", "h", 1],
    ["_ms", "ms", 1],
    ["_s", "s", 1],
    ["_kg", "kg", 1],
    ["_mm", "mm", 1],
    ["_m", "m", 1],
    ["_rad", "rad", 1],
    ["_deg", "°", 1],
    ["_nm", "N·m", 1],
    ["_n", "N", 1],
    ["_a", "A", 1],
    ["_k", "K", 1],
    ["_hz", "Hz", 1],
    ["_w", "W", 1],
  ].sort((a, b) => b[0].length - a[0].length);

  function figureUnit(key) {
    const k = key.toLowerCase();
    for (const [suffix, unit, scale] of SUFFIXES) {
      if (k.endsWith(suffix) && k.length > suffix.length) {
        return { label: key.slice(0, -suffix.length).replaceAll("_", " "), unit, scale };
      }
    }
    if (k.startsWith("days_")) return { label: key.replaceAll("_", " "), unit: "d", scale: 1 };
    return { label: key.replaceAll("_", " "), unit: "", scale: 1 };
  }

  function formatNumber(x) {
    if (!Number.isFinite(x)) return "–";
    const a = Math.abs(x);
    if (a !== 0 && (a < 1e-3 || a >= 1e6)) return x.toExponential(2);
    if (Number.isInteger(x)) return String(x);
    return x.toPrecision(a < 1 ? 3 : 4).replace(/\.?0+$/, "");
  }

  function formatFigure(key, value) {
    const { label, unit, scale } = figureUnit(key);
    let text;
    if (value == null) text = "–";
    else if (typeof value === "number" && unit === "×") text = `${value.toFixed(2)} ×`;
    else if (typeof value === "number") text = formatNumber(value * scale) + (unit ? ` ${unit}` : "");
    else if (Array.isArray(value))
      text = `[${value.map((v) => (typeof v === "number" ? formatNumber(v * scale) : String(v))).join(", ")}]${unit ? ` ${unit}` : ""}`;
    else if (typeof value === "boolean") text = value ? "yes" : "no";
    else text = String(value);
    return { label, text };
  }

  function figureList(figures) {
    const keys = Object.keys(figures || {}).sort();
    if (!keys.length) return el("p", { cls: "muted", text: "no figures" });
    return el(
      "dl",
      { cls: "figures" },
      keys.map((k) => {
        const f = formatFigure(k, figures[k]);
        return el("div", { "data-key": k }, el("dt", { text: f.label }), el("dd", { text: f.text }));
      }),
    );
  }

  function reasonList(reasons, stateName) {
    if (reasons && reasons.length) return el("ul", { cls: "reasons" }, reasons.map((r) => el("li", { text: r })));
    const words = stateName == null ? "no assessment yet" : stateName === "steady" ? "nothing to report" : "";
    return el("p", { cls: "muted", text: words });
  }

  // ---- time -----------------------------------------------------------------------------------
  const ms = (iso) => Date.parse(iso);
  const isoOf = (t) => new Date(t).toISOString();
  const pad = (n) => String(n).padStart(2, "0");
  function clock(t, withSeconds = true) {
    const d = new Date(t);
    const hm = `${pad(d.getUTCHours())}:${pad(d.getUTCMinutes())}`;
    return withSeconds ? `${hm}:${pad(d.getUTCSeconds())}` : hm;
  }
  function dateTime(iso) {
    if (!iso) return "–";
    const d = new Date(ms(iso));
    return `${d.getUTCFullYear()}-${pad(d.getUTCMonth() + 1)}-${pad(d.getUTCDate())} ${clock(d.getTime())} UTC`;
  }
  function age(iso) {
    if (!iso) return "";
    const s = (Date.now() - ms(iso)) / 1000;
    if (s < 0) return "";
    if (s < 90) return `${Math.round(s)} s ago`;
    if (s < 5400) return `${Math.round(s / 60)} min ago`;
    if (s < 172800) return `${Math.round(s / 3600)} h ago`;
    return `${Math.round(s / 86400)} d ago`;
  }

  function markUpdated(ok, message) {
    const node = document.getElementById("updated");
    if (!node) return;
    node.classList.toggle("stale", !ok);
    node.textContent = ok ? `updated ${clock(Date.now())} UTC` : message;
  }

  // ---- plots ----------------------------------------------------------------------------------
  function niceStep(span, count) {
    const raw = span / Math.max(count, 1);
    const mag = 10 ** Math.floor(Math.log10(raw));
    const m = raw / mag;
    return (m < 1.5 ? 1 : m < 3 ? 2 : m < 7 ? 5 : 10) * mag;
  }
  function ticks(lo, hi, count) {
    const step = niceStep(hi - lo, count);
    const out = [];
    for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
    return out;
  }
  const TIME_STEPS_S = [1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 10800, 21600, 43200, 86400];
  function timeTicks(t0, t1, count) {
    const span = (t1 - t0) / 1000;
    const step = (TIME_STEPS_S.find((s) => span / s <= count) || 86400) * 1000;
    const out = [];
    for (let t = Math.ceil(t0 / step) * step; t <= t1; t += step) out.push(t);
    return { values: out, seconds: step < 60000 };
  }

  let plotCount = 0;

  // opts: {title, unit, x0, x1, xKind: "clock" | "relative", origin, series: [{label, colour, dash,
  //   points: [{x, y, lo, hi, ok}]}], spans: [{x0, x1, kind: "blind" | "hatch" | "event", label}],
  //   strip: {label, points: [{x, on}]}, note}
  function plot(opts) {
    plotCount += 1;
    const id = `p${plotCount}`;
    const W = 760;
    const stripH = opts.strip ? 34 : 0;
    const H = 250 + stripH;
    const L = 70;
    const R = 14;
    const T = 12;
    const B = 38 + stripH;
    const x0 = opts.x0;
    const x1 = opts.x1 > opts.x0 ? opts.x1 : opts.x0 + 1;
    const all = opts.series.flatMap((s) => s.points);
    let lo = Infinity;
    let hi = -Infinity;
    for (const p of all) {
      for (const v of [p.y, p.lo, p.hi]) {
        if (Number.isFinite(v)) {
          lo = Math.min(lo, v);
          hi = Math.max(hi, v);
        }
      }
    }
    if (!Number.isFinite(lo)) {
      lo = 0;
      hi = 1;
    }
    if (hi - lo < 1e-12 * Math.max(1, Math.abs(hi))) {
      const d = Math.abs(hi) > 0 ? Math.abs(hi) * 0.1 : 1;
      lo -= d;
      hi += d;
    }
    const padY = (hi - lo) * 0.06;
    lo -= padY;
    hi += padY;
    const X = (x) => L + ((x - x0) / (x1 - x0)) * (W - L - R);
    const Y = (y) => T + (1 - (y - lo) / (hi - lo)) * (H - T - B);
    const f1 = (v) => v.toFixed(1);

    const defs = sv(
      "defs",
      {},
      sv(
        "pattern",
        { id: `${id}-hatch`, width: 8, height: 8, patternUnits: "userSpaceOnUse", patternTransform: "rotate(45)" },
        sv("rect", { width: 8, height: 8, fill: "rgba(140,140,140,0.10)" }),
        sv("line", { x1: 0, y1: 0, x2: 0, y2: 8, stroke: "#8c8c8c", "stroke-width": 1.5 }),
      ),
      sv("clipPath", { id: `${id}-clip` }, sv("rect", { x: L, y: T, width: W - L - R, height: H - T - B })),
    );
    const svgNode = sv("svg", {
      class: "plot",
      viewBox: `0 0 ${W} ${H}`,
      role: "img",
      "aria-label": `${opts.title}${opts.unit ? ` [${opts.unit}]` : ""}`,
      "data-series": opts.series.length,
      "data-points": all.length,
    });
    svgNode.append(defs);

    // grid and axes
    const grid = sv("g", { class: "grid" });
    const axis = sv("g", { class: "axis" });
    for (const v of ticks(lo, hi, 5)) {
      grid.append(sv("line", { x1: L, x2: W - R, y1: f1(Y(v)), y2: f1(Y(v)) }));
      axis.append(sv("text", { x: L - 6, y: f1(Y(v) + 4), "text-anchor": "end", text: formatNumber(v) }));
    }
    const xt =
      opts.xKind === "relative"
        ? { values: ticks(x0 - opts.origin, x1 - opts.origin, 7).map((v) => v + opts.origin), relative: true }
        : timeTicks(x0, x1, 7);
    for (const t of xt.values) {
      grid.append(sv("line", { x1: f1(X(t)), x2: f1(X(t)), y1: T, y2: H - B }));
      const label = xt.relative ? `${formatNumber(t - opts.origin)}` : clock(t, xt.seconds);
      axis.append(sv("text", { x: f1(X(t)), y: H - B + 16, "text-anchor": "middle", text: label }));
    }
    axis.append(sv("line", { x1: L, x2: L, y1: T, y2: H - B }));
    axis.append(sv("line", { x1: L, x2: W - R, y1: H - B, y2: H - B }));
    axis.append(
      sv("text", {
        x: (L + W - R) / 2,
        y: H - stripH - 4,
        "text-anchor": "middle",
        text: xt.relative ? "time from event start [ms]" : "time [UTC]",
      }),
    );
    if (opts.unit) {
      axis.append(sv("text", { x: 14, y: (T + H - B) / 2, transform: `rotate(-90 14 ${(T + H - B) / 2})`, "text-anchor": "middle", text: opts.unit }));
    }
    svgNode.append(grid);

    const body = sv("g", { "clip-path": `url(#${id}-clip)` });
    // spans: not monitored (grey), not identifiable (hatched), events (red dashed)
    for (const s of opts.spans || []) {
      const a = X(Math.max(s.x0, x0));
      const b = X(Math.min(s.x1, x1));
      const w = Math.max(b - a, 2);
      const attrs = { x: f1(a), y: T, width: f1(w), height: H - T - B, "data-kind": s.kind };
      if (s.kind === "hatch") attrs.fill = `url(#${id}-hatch)`;
      const rect = sv("rect", { ...attrs, class: s.kind === "event" ? "event-span" : s.kind === "blind" ? "blind" : "hatch" });
      if (s.label) rect.append(sv("title", { text: s.label }));
      body.append(rect);
    }
    // series: band for +-2 std where identifiable, line split at gaps; non-identifiable stretches dotted
    opts.series.forEach((s) => {
      const pts = s.points.filter((p) => Number.isFinite(p.y)).sort((a, b) => a.x - b.x);
      const gaps = pts.slice(1).map((p, i) => p.x - pts[i].x);
      const typical = gaps.length ? [...gaps].sort((a, b) => a - b)[Math.floor(gaps.length / 2)] : 0;
      const maxGap = typical > 0 ? 4 * typical : Infinity; // a longer gap breaks the line
      const runs = [];
      let run = [];
      pts.forEach((p, i) => {
        const gap = i > 0 ? p.x - pts[i - 1].x : 0;
        const broken = i > 0 && (gap > maxGap || (p.ok !== false) !== (pts[i - 1].ok !== false));
        if (broken) {
          if (gap <= maxGap) run.push(p); // join the stretches at a change of kind
          runs.push(run);
          run = [];
        }
        run.push(p);
      });
      if (run.length) runs.push(run);
      const g = sv("g", { class: "series-group", "data-label": s.label });
      for (const r of runs) {
        const ok = r[0].ok !== false; // a run has the kind of its first point
        const withBand = r.filter((p) => p.ok !== false && Number.isFinite(p.lo) && Number.isFinite(p.hi));
        if (ok && withBand.length > 1) {
          const upper = withBand.map((p) => `${f1(X(p.x))},${f1(Y(p.hi))}`);
          const lower = withBand.map((p) => `${f1(X(p.x))},${f1(Y(p.lo))}`).reverse();
          g.append(sv("polygon", { class: "band", points: upper.concat(lower).join(" "), fill: s.colour, "fill-opacity": 0.16 }));
        }
        const d = r.map((p, i) => `${i ? "L" : "M"}${f1(X(p.x))} ${f1(Y(p.y))}`).join(" ");
        const line = sv("path", {
          class: ok ? "series" : "series not-identifiable",
          d: r.length === 1 ? `${d} h0.01` : d,
          stroke: s.colour,
          "stroke-dasharray": ok ? s.dash : "1 4",
          "stroke-linecap": "round",
          "stroke-width": ok ? "" : 1.6,
          "data-points": r.length,
        });
        g.append(line);
      }
      body.append(g);
    });
    svgNode.append(body, axis);

    // tool state strip below the time axis
    if (opts.strip) {
      const y = H - stripH + 6;
      const strip = sv("g", { class: "strip", "data-label": opts.strip.label });
      strip.append(sv("text", { x: L - 6, y: y + 13, "text-anchor": "end", text: opts.strip.label }));
      strip.append(sv("rect", { x: L, y, width: W - L - R, height: 18, fill: "none", stroke: "#8c8c8c" }));
      const pts = opts.strip.points;
      const endOf = (i) => (i + 1 < pts.length ? pts[i + 1].x : pts[i].x + (i > 0 ? pts[i].x - pts[i - 1].x : 1));
      for (let i = 0; i < pts.length; i += 1) {
        if (!pts[i].on) continue;
        let j = i;
        while (j + 1 < pts.length && pts[j + 1].on) j += 1; // one rectangle per stretch of "on" samples
        const a = X(pts[i].x);
        strip.append(sv("rect", { class: "tool-on", x: f1(a), y, width: f1(Math.max(X(endOf(j)) - a, 1)), height: 18, "data-samples": j - i + 1 }));
        i = j;
      }
      svgNode.append(strip);
    }

    const legend = el("div", { cls: "legend" });
    for (const s of opts.series) {
      const sample = sv("svg", { viewBox: "0 0 40 12", "aria-hidden": "true" }, sv("line", { x1: 1, y1: 6, x2: 39, y2: 6, stroke: s.colour, "stroke-width": 2.5, "stroke-dasharray": s.dash }));
      legend.append(el("span", {}, sample, s.label));
    }
    const kinds = new Set((opts.spans || []).map((s) => s.kind));
    const extra = [];
    if (opts.series.some((s) => s.points.some((p) => Number.isFinite(p.lo)))) extra.push("shaded band: estimate ± 2 std");
    if (kinds.has("hatch")) extra.push("hatched / dotted: not identifiable (the motion did not excite it)");
    if (kinds.has("blind")) extra.push("grey: not monitored");
    if (kinds.has("event")) extra.push("red dashed: event");
    if (opts.strip) extra.push(`filled strip: ${opts.strip.onWord || "on"}`);
    for (const e of extra) legend.append(el("span", { cls: "muted", text: e }));

    const caption = el("figcaption", { text: `${opts.title}${opts.unit ? ` [${opts.unit}]` : ""}` });
    const box = el("figure", { cls: "plot-box" }, caption, svgNode, legend);
    if (!all.length) box.append(el("p", { cls: "note", text: "no points in this window" }));
    if (opts.note) box.append(el("p", { cls: "note", text: opts.note }));
    return box;
  }

  // ---- shared bits ----------------------------------------------------------------------------
  const content = () => document.getElementById("content");

  function replaceBody(nodes) {
    const main = content();
    const h1 = main.querySelector("h1");
    main.replaceChildren(h1, ...nodes);
  }

  function showProblem(err) {
    markUpdated(false, "no answer from the service");
    const main = content();
    let box = main.querySelector(".problem");
    if (!box) {
      box = el("p", { cls: "problem", role: "alert" });
      main.querySelector("h1").after(box);
    }
    box.textContent = `Could not read the data: ${err.message}. Showing the last figures read.`;
    const loading = main.querySelector(".loading");
    if (loading) loading.remove();
  }

  // ---- sign-in ---------------------------------------------------------------------------------
  let signingIn = false;

  function showSignIn(reason) {
    signingIn = true;
    markUpdated(false, "sign-in needed");
    const main = content();
    const existing = main.querySelector("form.sign-in");
    if (existing) {
      existing.querySelector(".problem").textContent = reason || "";
      return;
    }
    // no name attribute: even a submitted form could not carry the token into a URL
    const input = el("input", { id: "token-field", type: "password", autocomplete: "off", spellcheck: "false", required: true });
    const problem = el("p", { cls: "problem", role: "alert", "aria-live": "polite", text: reason || "" });
    const form = el(
      "form",
      { cls: "sign-in", "aria-label": "sign in", autocomplete: "off", novalidate: true },
      el("h2", { text: "Sign in to read the data" }),
      el("p", {
        text:
          "This service asks for an access token before it shows any data. Paste the token you were given. " +
          "It stays in this browser tab only and is sent with this page's requests to the service; " +
          "closing the tab or choosing sign out forgets it.",
      }),
      el("label", { for: "token-field", text: "Access token" }),
      input,
      el("button", { type: "submit", text: "Sign in" }),
      problem,
    );
    form.addEventListener("submit", async (ev) => {
      ev.preventDefault();
      const token = input.value.trim();
      input.value = "";
      if (!token) {
        problem.textContent = "Paste a token first.";
        return;
      }
      problem.textContent = "Checking the token…";
      let answer;
      try {
        answer = await request(`${API}/robots`, token); // the cheapest data route; read-only like all of them
      } catch (err) {
        problem.textContent = `The service did not answer (${err.message}).`;
        return;
      }
      if (answer.status === 401) {
        problem.textContent = "The service refused this token.";
        return;
      }
      keepToken(token);
      form.remove();
      signingIn = false;
      showSignOut();
      const loading = el("p", { cls: "loading", text: "Reading the store…" });
      replaceBody([loading]);
      delete content().dataset.ready; // being filled again
      refreshNow();
    });
    replaceBody([form]);
    input.focus();
  }

  function showSignOut() {
    const bar = document.querySelector("header.topbar");
    if (!bar || bar.querySelector("button.sign-out") || !storedToken()) return;
    const button = el("button", { type: "button", cls: "sign-out", text: "sign out" });
    button.addEventListener("click", () => {
      keepToken("");
      button.remove();
      showSignIn("Signed out: the token is forgotten in this tab.");
    });
    bar.append(button);
  }

  const robotHref = (rid) => `/robot/${rid.split("/").map(encodeURIComponent).join("/")}`;
  const effortUnit = (family) => (family === "hexapod" ? "N" : "N·m");
  const viscousUnit = (family) => (family === "hexapod" ? "N·s/m" : "N·m·s/rad");

  function eventTable(events, withRobot) {
    if (!events.length) return el("p", { cls: "muted", text: "no events" });
    const head = el("tr", {}, ["when", withRobot ? "robot" : null, "kind", "severity", "summary", ""].filter((h) => h != null).map((h) => el("th", { text: h })));
    const rows = events.map((e) =>
      el(
        "tr",
        { "data-event": e.event_id },
        el("td", { text: dateTime(e.start) }),
        withRobot ? el("td", {}, el("a", { href: robotHref(e.robot_id), text: e.robot_id })) : null,
        el("td", { text: e.kind.replaceAll("_", " ") }),
        el("td", { text: e.severity }),
        el("td", { text: e.summary }),
        el("td", {}, el("a", { href: `/event/${e.event_id}`, text: "evidence →" })),
      ),
    );
    return el("table", { cls: "events" }, el("thead", {}, head), el("tbody", {}, rows));
  }

  // ---- overview -------------------------------------------------------------------------------
  async function overview() {
    const since = isoOf(Date.now() - 86400000);
    const [list, events] = await Promise.all([
      getJson(`${API}/robots`),
      getJson(`${API}/events?start=${encodeURIComponent(since)}&limit=1000`),
    ]);
    const recent = new Map();
    for (const e of events.events) recent.set(e.robot_id, (recent.get(e.robot_id) || 0) + 1);
    const robots = [...list.robots].sort(
      (a, b) => stateOf(b.health && b.health.state).rank - stateOf(a.health && a.health.state).rank || a.robot_id.localeCompare(b.robot_id),
    );
    const counts = {};
    for (const r of robots) {
      const w = stateOf(r.health && r.health.state).word;
      counts[w] = (counts[w] || 0) + 1;
    }
    const summary = el(
      "p",
      { cls: "cell-summary" },
      `${robots.length} robot${robots.length === 1 ? "" : "s"}: `,
      Object.entries(counts)
        .map(([w, n]) => `${n} ${w}`)
        .join(", "),
    );
    const cards = robots.map((r) => {
      const h = r.health;
      const s = stateOf(h && h.state);
      return el(
        "article",
        { cls: `robot-card ${s.cls}`, "data-robot": r.robot_id, "data-state": s.word },
        el("header", {}, el("span", { cls: "robot-name", text: r.name }), badge(h && h.state)),
        el("div", { cls: "robot-where", text: `${r.site} / ${r.cell} · ${r.family} · ${r.n_actuators} actuators` }),
        reasonList(h && h.reasons, h && h.state),
        h ? figureList(h.figures) : null,
        el(
          "div",
          { cls: "muted" },
          h ? `assessed ${dateTime(h.time)} (${age(h.time)})` : "not assessed yet",
          ` · events in the last 24 h: ${recent.get(r.robot_id) || 0}`,
        ),
        el("a", { cls: "open-link", href: robotHref(r.robot_id), text: `open ${r.name} →` }),
      );
    });
    const newest = events.events.slice(-10).reverse();
    replaceBody([
      summary,
      robots.length ? el("section", { cls: "robot-grid", "aria-label": "robots" }, cards) : el("p", { cls: "muted", text: "no robots registered yet" }),
      el("h2", { text: "Newest events (last 24 h)" }),
      eventTable(newest, true),
    ]);
    markUpdated(true);
  }

  // ---- robot page -----------------------------------------------------------------------------
  const WINDOWS = [
    ["15 min", 900],
    ["1 h", 3600],
    ["6 h", 21600],
    ["24 h", 86400],
  ];
  const FORECAST_KEY = /wear|days_to|forecast|remaining|until/;

  function groupEstimates(points, family) {
    const groups = [
      { title: "Payload mass", unit: "kg", test: (n) => n.endsWith("mass") || n === "payload_m" },
      { title: "Coulomb friction per actuator", unit: effortUnit(family), test: (n) => n.startsWith("coulomb_") },
      { title: "Viscous friction per actuator", unit: viscousUnit(family), test: (n) => n.startsWith("viscous_") },
      { title: "Effort offset per actuator", unit: effortUnit(family), test: (n) => n.startsWith("offset_") },
    ];
    const byName = new Map();
    for (const p of points) {
      if (!byName.has(p.parameter)) byName.set(p.parameter, []);
      byName.get(p.parameter).push(p);
    }
    return groups
      .map((g) => ({ ...g, names: [...byName.keys()].filter(g.test).sort((a, b) => a.localeCompare(b, "en", { numeric: true })) }))
      .filter((g) => g.names.length)
      .map((g) => ({ ...g, series: g.names.map((n) => ({ name: n, points: byName.get(n) })) }));
  }

  function notIdentifiableSpans(points) {
    const spans = [];
    const sorted = [...points].sort((a, b) => a.x - b.x);
    let start = null;
    sorted.forEach((p, i) => {
      if (!p.ok && start == null) start = i > 0 ? sorted[i - 1].x : p.x;
      if (p.ok && start != null) {
        spans.push({ x0: start, x1: p.x, kind: "hatch", label: "not identifiable" });
        start = null;
      }
    });
    if (start != null) spans.push({ x0: start, x1: sorted[sorted.length - 1].x, kind: "hatch", label: "not identifiable" });
    return spans;
  }

  let robotWindowS = 3600;

  async function robotPage(main) {
    const rid = main.dataset.robot;
    const api = main.dataset.api;
    const [list, health] = await Promise.all([getJson(`${API}/robots`), getJson(`${api}/health`)]);
    const info = list.robots.find((r) => r.robot_id === rid) || { family: "delta", name: rid, n_actuators: 0 };
    const family = info.family;
    const newest = health.robot && health.robot.time ? ms(health.robot.time) : Date.now();
    const end = Date.now() - newest < robotWindowS * 1000 ? Date.now() : newest + 60000;
    const start = end - robotWindowS * 1000;
    const note = (first) => (first > start ? `the store holds data from ${dateTime(isoOf(first))} on in this window` : "");
    const range = `start=${encodeURIComponent(isoOf(start))}&end=${encodeURIComponent(isoOf(end))}`;
    const every = Math.max(robotWindowS / 300, 0.5);
    const [estimates, residuals, blind, events] = await Promise.all([
      getAllPoints(`${api}/estimates?${range}&every=${every}&limit=10000`),
      getAllPoints(`${api}/residuals?${range}&every=${every}&limit=10000`),
      getJson(`${api}/unmonitored?${range}`),
      getJson(`${API}/events?robot_id=${encodeURIComponent(rid)}&start=${encodeURIComponent(isoOf(end - 7 * 86400000))}&limit=1000`),
    ]);

    // health of the robot and of each actuator
    const robotH = health.robot;
    const robotBox = el(
      "section",
      { cls: "robot-health", "data-state": stateOf(robotH && robotH.state).word },
      el("div", { cls: "toolbar" }, badge(robotH && robotH.state), el("span", { cls: "muted", text: robotH ? `assessed ${dateTime(robotH.time)} (${age(robotH.time)})` : "not assessed yet" })),
      reasonList(robotH && robotH.reasons, robotH && robotH.state),
      robotH ? figureList(robotH.figures) : null,
    );
    const actuatorCards = health.actuators.map((a) =>
      el(
        "article",
        { cls: "actuator-card", "data-scope": a.scope, "data-state": stateOf(a.state).word },
        el("h3", {}, `${a.scope.replace(":", " ")} `, badge(a.state)),
        reasonList(a.reasons, a.state),
        figureList(a.figures),
      ),
    );

    // wear forecast: whatever forecast figures the assessments carry
    const forecastRows = [];
    for (const h of [robotH, ...health.actuators].filter(Boolean)) {
      for (const [k, v] of Object.entries(h.figures || {}).sort()) {
        if (!FORECAST_KEY.test(k)) continue;
        const f = formatFigure(k, v);
        forecastRows.push(el("tr", { "data-key": k }, el("td", { text: h.scope.replace(":", " ") }), el("td", { text: f.label }), el("td", { cls: "num", text: f.text })));
      }
    }
    const forecast = forecastRows.length
      ? el("table", { cls: "forecast" }, el("thead", {}, el("tr", {}, ["scope", "figure", "value"].map((h) => el("th", { text: h })))), el("tbody", {}, forecastRows))
      : el("p", { cls: "muted", text: "the latest assessment carries no wear forecast" });

    // trends
    const blindSpans = blind.intervals.map((b) => ({ x0: ms(b.start), x1: ms(b.end), kind: "blind", label: `not monitored: ${b.cause} ${b.detail}` }));
    const eventSpans = events.events
      .filter((e) => ms(e.end) >= start && ms(e.start) <= end)
      .map((e) => ({ x0: ms(e.start), x1: ms(e.end), kind: "event", label: `${e.kind}: ${e.summary}` }));
    const byActuator = new Map();
    for (const p of residuals) {
      if (!byActuator.has(p.actuator)) byActuator.set(p.actuator, []);
      byActuator.get(p.actuator).push({ x: ms(p.time), y: p.rms });
    }
    const firstOf = (pts) => pts.reduce((m, p) => Math.min(m, ms(p.time)), Infinity);
    const first = Math.min(firstOf(residuals), firstOf(estimates));
    const x0 = Number.isFinite(first) && first > start ? first : start; // do not draw an empty stretch before the data
    const residualSeries = [...byActuator.keys()].sort((a, b) => a - b).map((a) => ({ label: `actuator ${a}`, ...look(a), points: byActuator.get(a) }));
    const plots = [
      plot({
        title: "Effort residual RMS per actuator",
        unit: effortUnit(family),
        x0,
        x1: end,
        series: residualSeries,
        spans: [...blindSpans, ...eventSpans],
      }),
    ];
    for (const g of groupEstimates(estimates, family)) {
      const series = g.series.map((s, i) => ({
        label: s.name.replaceAll("_", " "),
        ...look(i),
        points: s.points.map((p) => ({ x: ms(p.time), y: p.value, lo: p.value - 2 * p.std, hi: p.value + 2 * p.std, ok: p.identifiable })),
      }));
      const hatches = series.flatMap((s) => notIdentifiableSpans(s.points));
      plots.push(plot({ title: g.title, unit: g.unit, x0, x1: end, series, spans: [...blindSpans, ...hatches] }));
    }

    // latest value of every estimated parameter
    const latest = new Map();
    for (const p of estimates) latest.set(p.parameter, p);
    const estimateRows = [...latest.values()]
      .sort((a, b) => a.parameter.localeCompare(b.parameter, "en", { numeric: true }))
      .map((p) =>
        el(
          "tr",
          { "data-parameter": p.parameter },
          el("td", { text: p.parameter.replaceAll("_", " ") }),
          el("td", { cls: "num", text: `${formatNumber(p.value)} ± ${formatNumber(2 * p.std)}` }),
          el("td", { text: p.identifiable ? "yes" : "no (not excited by the motion)" }),
          el("td", { text: dateTime(p.time) }),
        ),
      );
    const estimateTable = estimateRows.length
      ? el("table", { cls: "estimates" }, el("thead", {}, el("tr", {}, ["parameter", "estimate ± 2 std", "identifiable", "at"].map((h) => el("th", { text: h })))), el("tbody", {}, estimateRows))
      : el("p", { cls: "muted", text: "no estimates in this window" });

    const select = el("select", { id: "window", "aria-label": "time window" }, WINDOWS.map(([label, s]) => el("option", { value: s, selected: s === robotWindowS, text: label })));
    select.addEventListener("change", () => {
      robotWindowS = Number(select.value);
      refreshNow();
    });

    replaceBody([
      el("p", { cls: "robot-where", text: `${info.family} · ${info.n_actuators} actuators` }),
      el("h2", { text: "Health" }),
      robotBox,
      el("section", { cls: "actuator-grid", "aria-label": "actuators" }, actuatorCards),
      el("h2", { text: "Wear forecast" }),
      forecast,
      el("h2", { text: "Trends" }),
      el("div", { cls: "toolbar" }, el("label", { for: "window", text: "window" }), select, el("span", { cls: "muted", text: `${dateTime(isoOf(start))} – ${dateTime(isoOf(end))}` }), el("span", { cls: "muted", text: note(first) })),
      el("section", { cls: "plot-grid", "aria-label": "trends" }, plots),
      el("h2", { text: "Latest estimates" }),
      estimateTable,
      el("h2", { text: "Events (last 7 days)" }),
      eventTable(events.events.slice(-50).reverse(), false),
    ]);
    markUpdated(true);
  }

  // ---- event page -----------------------------------------------------------------------------
  async function eventPage(main) {
    const id = main.dataset.event;
    const [e, list] = await Promise.all([getJson(`${API}/events/${encodeURIComponent(id)}`), getJson(`${API}/robots`)]);
    const info = list.robots.find((r) => r.robot_id === e.robot_id) || { family: "delta" };
    main.querySelector("h1").textContent = `Event ${e.event_id}: ${e.kind} on ${e.robot_id}`; // the shell may say less
    const t0 = ms(e.start);
    const facts = el(
      "dl",
      { cls: "figures event-facts" },
      [
        ["robot", el("a", { href: robotHref(e.robot_id), text: e.robot_id })],
        ["kind", e.kind.replaceAll("_", " ")],
        ["severity", e.severity],
        ["start", dateTime(e.start)],
        ["duration", `${formatNumber(ms(e.end) - t0)} ms`],
      ].map(([k, v]) => el("div", {}, el("dt", { text: k }), el("dd", {}, v))),
    );
    const nodes = [el("p", { cls: "event-summary", text: e.summary }), facts, el("h2", { text: "Figures" }), figureList(e.figures)];
    const ev = e.evidence;
    nodes.push(el("h2", { text: "Evidence window" }));
    if (!ev || !ev.time.length) {
      nodes.push(el("p", { cls: "muted", text: "no raw samples were kept for this event" }));
    } else {
      const tx = ev.time.map(ms);
      const nAct = ev.measured[0].length;
      const unit = ev.measured_kind === "motor_current" ? "A" : effortUnit(info.family);
      const measuredSeries = [];
      const positionSeries = [];
      for (let a = 0; a < nAct; a += 1) {
        measuredSeries.push({ label: `actuator ${a + 1}`, ...look(a), points: tx.map((x, i) => ({ x, y: ev.measured[i][a] })) });
        positionSeries.push({ label: `actuator ${a + 1}`, ...look(a), points: tx.map((x, i) => ({ x, y: ev.position[i][a] })) });
      }
      const span = [{ x0: t0, x1: ms(e.end), kind: "event", label: e.summary }];
      const strip = ev.gripping ? { label: "tool", onWord: "gripping", points: tx.map((x, i) => ({ x, on: ev.gripping[i] })) } : null;
      const x0 = tx[0];
      const x1 = tx[tx.length - 1];
      const what = ev.measured_kind === "motor_current" ? "Measured motor current per actuator" : "Measured effort per actuator";
      nodes.push(
        el(
          "section",
          { cls: "plot-grid", "aria-label": "evidence" },
          plot({ title: what, unit, x0, x1, xKind: "relative", origin: t0, series: measuredSeries, spans: span, strip }),
          plot({ title: "Actuator position", unit: info.family === "hexapod" ? "m" : "rad", x0, x1, xKind: "relative", origin: t0, series: positionSeries, spans: span }),
        ),
      );
      const rows = [];
      for (let a = 0; a < nAct; a += 1) {
        const col = ev.measured.map((r) => r[a]);
        const peak = col.reduce((m, v) => (Math.abs(v) > Math.abs(m) ? v : m), 0);
        rows.push(el("tr", {}, el("td", { text: `actuator ${a + 1}` }), el("td", { cls: "num", text: formatNumber(Math.min(...col)) }), el("td", { cls: "num", text: formatNumber(Math.max(...col)) }), el("td", { cls: "num", text: formatNumber(peak) })));
      }
      nodes.push(
        el("p", { cls: "note", text: `${ev.time.length} samples from ${dateTime(ev.time[0])}, ${formatNumber(x1 - x0)} ms` }),
        el("table", { cls: "evidence-stats" }, el("thead", {}, el("tr", {}, ["", `min [${unit}]`, `max [${unit}]`, `peak [${unit}]`].map((h) => el("th", { text: h })))), el("tbody", {}, rows)),
      );
    }
    replaceBody(nodes);
    markUpdated(true);
  }

  // ---- start ----------------------------------------------------------------------------------
  let busy = false;
  async function refreshNow() {
    const main = content();
    if (busy || signingIn || !main) return;
    busy = true;
    try {
      if (main.dataset.page === "overview") await overview();
      else if (main.dataset.page === "robot") await robotPage(main);
      else if (main.dataset.page === "event") await eventPage(main);
      else {
        const loading = main.querySelector(".loading");
        if (loading) loading.remove();
        markUpdated(true);
      }
      main.dataset.ready = "yes";
    } catch (err) {
      if (err instanceof SignInNeeded) {
        showSignIn(err.message);
        main.dataset.ready = "sign-in";
      } else if (err.status === 404 && (main.dataset.page === "robot" || main.dataset.page === "event")) {
        // the shell did not look (it is served without a token); the API says the robot or event is unknown
        const what = main.dataset.page === "robot" ? `robot ${main.dataset.robot}` : `event ${main.dataset.event}`;
        main.querySelector("h1").textContent = `${what} is not known here`;
        replaceBody([]);
        markUpdated(true);
        main.dataset.page = "missing"; // nothing to refresh
        main.dataset.ready = "yes";
      } else {
        showProblem(err);
        main.dataset.ready = "problem";
      }
    } finally {
      busy = false;
    }
  }

  function start() {
    const main = content();
    if (!main) return;
    showSignOut();
    refreshNow();
    const period = Number(main.dataset.refreshS || 5) * 1000;
    if (main.dataset.page === "overview") setInterval(refreshNow, period);
    else if (main.dataset.page === "robot") setInterval(refreshNow, period * 3);
  }

  if (document.readyState === "loading") document.addEventListener("DOMContentLoaded", start);
  else start();
})();
