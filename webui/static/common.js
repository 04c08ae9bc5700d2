/* lampyr page helpers: requests with the anti-forgery token, number formats, state marks. */
"use strict";
const Lampyr = (() => {
  const token = document.querySelector('meta[name="lampyr-token"]').content;

  async function call(method, url, body) {
    const opts = {method, headers: {"X-Lampyr-Token": token, "Accept": "application/json"},
                  credentials: "same-origin"};
    if (body instanceof FormData) opts.body = body;
    else if (body !== undefined) {
      opts.headers["Content-Type"] = "application/json";
      opts.body = JSON.stringify(body);
    }
    const resp = await fetch(url, opts);
    let data = null;
    try { data = await resp.json(); } catch (e) { data = null; }
    if (resp.status === 401) { location.href = "/login?next=" + encodeURIComponent(location.pathname); }
    if (!resp.ok) throw new Error((data && data.error) || ("the farm answered " + resp.status));
    return data;
  }
  const get = (url) => call("GET", url);
  const post = (url, body) => call("POST", url, body === undefined ? {} : body);

  /* Poll `fn` every `ms` while the page is visible; slower after errors. */
  function poll(fn, ms) {
    let wait = ms, timer = null;
    async function turn() {
      timer = null;
      try { await fn(); wait = ms; setStale(false); }
      catch (e) { wait = Math.min(wait * 2, 30000); setStale(true, e.message); }
      if (!document.hidden) timer = setTimeout(turn, wait);
    }
    document.addEventListener("visibilitychange", () => {
      if (!document.hidden && timer === null) turn();
    });
    turn();
    // poll now (a turn in progress, timer === null, is left to finish)
    return () => { if (timer !== null) { clearTimeout(timer); turn(); } };
  }

  function setStale(on, why) {
    document.body.classList.toggle("stale", on);
    if (on) say("The farm does not answer (" + why + "); trying again.", "bad", 4000);
  }

  let noticeTimer = null;
  function say(text, kind, ms) {
    const box = document.getElementById("notice");
    box.textContent = text;
    box.className = "notice " + (kind || "");
    box.hidden = false;
    clearTimeout(noticeTimer);
    noticeTimer = setTimeout(() => { box.hidden = true; }, ms || 3500);
  }

  function el(tag, attrs, ...kids) {
    const node = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v === null || v === undefined || v === false) continue;
      if (k === "class") node.className = v;
      else if (k === "text") node.textContent = v;
      else if (k.startsWith("on")) node.addEventListener(k.slice(2), v);
      else node.setAttribute(k, v === true ? "" : v);
    }
    for (const kid of kids.flat()) {
      if (kid === null || kid === undefined) continue;
      node.append(kid instanceof Node ? kid : document.createTextNode(String(kid)));
    }
    return node;
  }

  /* Every state has a word, a shape and a colour, so no one needs the colour to read it. */
  const WORDS = {queued: "queued", waiting: "waiting", running: "rendering", rendering: "rendering",
                 done: "done", failed: "failed", paused: "paused", cancelled: "cancelled"};
  const SVGNS = "http://www.w3.org/2000/svg";
  function shape(name, attrs) {
    const n = document.createElementNS(SVGNS, name);
    for (const [k, v] of Object.entries(attrs)) n.setAttribute(k, v);
    return n;
  }
  function icon(state) {
    const s = shape("svg", {viewBox: "0 0 16 16", width: "14", height: "14", "aria-hidden": "true",
                            class: "ico ico-" + state});
    const C = "currentColor";
    switch (state) {
      case "done":
        s.append(shape("path", {d: "M3 8.5l3.2 3.2L13 4.8", fill: "none", stroke: C, "stroke-width": "2.4",
                                "stroke-linecap": "round", "stroke-linejoin": "round"})); break;
      case "running": case "rendering":
        s.append(shape("circle", {cx: 8, cy: 8, r: 6, fill: "none", stroke: C, "stroke-width": 2}),
                 shape("path", {d: "M8 2a6 6 0 0 1 0 12z", fill: C})); break;
      case "failed":
        s.append(shape("path", {d: "M8 1.5L15 14H1z", fill: C}),
                 shape("path", {d: "M8 6v4M8 11.6v.4", stroke: "#fff", "stroke-width": 1.8, "stroke-linecap": "round"})); break;
      case "paused":
        s.append(shape("rect", {x: 3.5, y: 2.5, width: 3, height: 11, fill: C}),
                 shape("rect", {x: 9.5, y: 2.5, width: 3, height: 11, fill: C})); break;
      case "cancelled":
        s.append(shape("circle", {cx: 8, cy: 8, r: 6, fill: "none", stroke: C, "stroke-width": 2}),
                 shape("path", {d: "M4 12L12 4", stroke: C, "stroke-width": 2})); break;
      default: /* queued, waiting */
        s.append(shape("circle", {cx: 8, cy: 8, r: 5.5, fill: "none", stroke: C, "stroke-width": 2,
                                  "stroke-dasharray": "3 2.2"}));
    }
    return s;
  }
  function badge(state) {
    return el("span", {class: "state st-" + state}, icon(state), WORDS[state] || state);
  }

  function count(n) {
    if (n === null || n === undefined) return "–";
    if (n >= 1e9) return (n / 1e9).toFixed(n >= 1e10 ? 0 : 1) + " G";
    if (n >= 1e6) return (n / 1e6).toFixed(n >= 1e7 ? 0 : 1) + " M";
    if (n >= 1e3) return (n / 1e3).toFixed(n >= 1e4 ? 0 : 1) + " k";
    return String(Math.round(n));
  }
  function span(seconds) {
    if (seconds === null || seconds === undefined || !isFinite(seconds)) return "–";
    seconds = Math.max(0, Math.round(seconds));
    if (seconds < 60) return seconds + " s";
    const m = Math.round(seconds / 60);
    if (m < 60) return m + " min";
    const h = Math.floor(m / 60);
    if (h < 48) return h + " h " + String(m % 60).padStart(2, "0") + " min";
    return Math.round(h / 24) + " days";
  }
  function clock(epoch) {
    const d = new Date(epoch * 1000), now = new Date();
    const hm = d.toLocaleTimeString([], {hour: "2-digit", minute: "2-digit"});
    if (d.toDateString() === now.toDateString()) return hm;
    const tomorrow = new Date(now.getTime() + 86400000);
    if (d.toDateString() === tomorrow.toDateString()) return "tomorrow " + hm;
    return d.toLocaleDateString([], {weekday: "short", day: "numeric", month: "short"}) + " " + hm;
  }
  function ago(epoch, now) {
    const s = (now || Date.now() / 1000) - epoch;
    return s < 20 ? "just now" : span(s) + " ago";
  }
  function pct(x, digits) {
    if (x === null || x === undefined || !isFinite(x)) return "–";
    return (100 * x).toFixed(digits === undefined ? 1 : digits) + " %";
  }

  /* Noise heat map: viridis, five anchors (van der Walt & Smith's matplotlib colour map;
     values from memory), on a log scale from NOISE_LO to NOISE_HI relative noise. */
  const VIRIDIS = [[68, 1, 84], [59, 82, 139], [33, 145, 140], [94, 201, 98], [253, 231, 37]];
  const NOISE_LO = 0.005, NOISE_HI = 0.5;
  function noiseT(noise) {
    const t = (Math.log10(noise) - Math.log10(NOISE_LO)) / (Math.log10(NOISE_HI) - Math.log10(NOISE_LO));
    return Math.min(1, Math.max(0, t));
  }
  function viridis(t) {
    const x = t * (VIRIDIS.length - 1), i = Math.min(VIRIDIS.length - 2, Math.floor(x)), f = x - i;
    const c = VIRIDIS[i].map((v, k) => Math.round(v + f * (VIRIDIS[i + 1][k] - v)));
    return "rgb(" + c.join(",") + ")";
  }
  function noiseColour(noise) { return viridis(noiseT(noise)); }

  return {call, get, post, poll, say, el, icon, badge, WORDS, count, span, clock, ago, pct,
          noiseColour, noiseT, viridis, NOISE_LO, NOISE_HI};
})();
