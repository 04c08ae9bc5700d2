/* A job: its frames strip (with a small picture of each frame), the chosen frame's picture
   (any layer of its file) with a tile map, playing the shot, and the actions. */
"use strict";
(() => {
  const L = Lampyr, el = L.el;
  const root = document.getElementById("job");
  const JOB = root.dataset.job;
  const base = "/api/jobs/" + encodeURIComponent(JOB);
  const files = "/jobs/" + encodeURIComponent(JOB) + "/frames/";
  const S = {job: null, layout: null, frames: [], sel: null, picked: new Set(), detail: null,
             exposure: 0, layer: null, overlay: "state", tile: null, imgKey: "", thumbs: new Map()};

  /* ---------------- job header ---------------- */
  function fact(dt, dd, cls) { return el("div", {class: cls || null}, el("dt", {text: dt}), el("dd", {text: dd})); }

  function renderHead() {
    const j = S.job, now = Date.now() / 1000;
    document.getElementById("job-state").replaceChildren(L.badge(j.state));
    const total = j.pixel_samples_total || 0;
    const p = total ? j.pixel_samples_done / total : 0;
    const fill = document.getElementById("job-fill");
    fill.style.width = (100 * p).toFixed(1) + "%";
    fill.className = "fill st-" + j.state;
    const ready = j.state === "running" && j.eta_seconds !== null
      ? L.clock(now + j.eta_seconds) + " (in " + L.span(j.eta_seconds) + ")" : (j.state === "done" ? "finished" : "–");
    document.getElementById("job-facts").replaceChildren(
      fact("done", L.pct(p, 1)),
      fact("frames", j.frames_done + " / " + j.frames),
      fact("samples per pixel", String(j.samples)),
      fact("speed", L.count(j.samples_per_second) + " samples/s"),
      fact("ready", ready, "wide"),
      fact("submitted", L.clock(j.submitted)),
      fact("tiles", (j.tile_size || "?") + " px, " + (j.batch_samples || "?") + " samples a batch"));
    document.getElementById("saved-in").textContent = j.out || "–";
    const running = ["running", "queued"].includes(j.state);
    document.getElementById("act-pause").hidden = !running;
    document.getElementById("act-resume").hidden = j.state !== "paused";
    const prio = document.getElementById("prio");
    if (document.activeElement !== prio) prio.value = j.priority;
    const nf = j.failed_batches || 0;
    const retry = document.getElementById("act-retry");
    retry.disabled = nf === 0;
    retry.textContent = nf ? "Retry failed work (" + nf + ")" : "Nothing failed";
    document.getElementById("act-cancel").hidden = ["done", "cancelled"].includes(j.state);
    renderReadyBy(j);
    const err = document.getElementById("job-error");
    err.hidden = !j.error;
    if (j.error) err.replaceChildren(L.icon("failed"), " The head could not run this shot: " + j.error);
  }

  function renderReadyBy(j) {
    const box = document.getElementById("ready-by");
    if (j.ready_by === undefined || j.ready_by === null) { box.hidden = true; return; }
    box.hidden = false;
    const parts = [el("strong", {text: "Ready by " + L.clock(j.ready_by)})];
    const f = j.forecast;  // fields of scheduler/ready_by.py forecast_fields
    if (j.ready_by_reached) {
      parts.push(el("span", {}, L.icon("paused"), " ready-by time reached: the head stopped" +
                    (f ? " at " + Math.round(f.spp_expected) + " of " + j.samples + " samples per pixel" : "")));
    } else if (j.state === "done") {
      parts.push(el("span", {class: "good"}, L.icon("done"), " finished before it"));
    } else if (!f) {
      parts.push(el("span", {class: "sub", text: "no forecast yet"}));
    } else {
      parts.push(el("span", {class: f.feasible ? "good" : "bad"}, L.icon(f.feasible ? "done" : "failed"),
                    f.feasible ? " on course" : " cannot reach every sample by then"));
      parts.push(el("span", {text: "expect " + Math.round(f.spp_expected) + " of " + j.samples + " samples per pixel"}));
      if (f.noise_expected !== null && f.noise_expected !== undefined)
        parts.push(el("span", {text: "noise about " + L.pct(f.noise_expected, 1)}));
      if (f.feasible && f.finish_expected) parts.push(el("span", {text: "done about " + L.clock(f.finish_expected)}));
      if (!f.feasible && f.level) parts.push(el("span", {text: "every frame gets at least " + f.level}));
    }
    box.replaceChildren(...parts);
  }

  /* ---------------- frame strip ---------------- */
  function noiseText(n) { return n === null || n === undefined ? "noise ?" : L.pct(n, n < 0.1 ? 1 : 0); }

  function renderStrip() {
    const strip = document.getElementById("strip");
    const cells = S.frames.map(f => {
      const chip = el("span", {class: "chip"});
      if (f.noise !== null && f.noise !== undefined) chip.style.background = L.noiseColour(f.noise);
      else chip.classList.add("unknown");
      const tick = el("input", {type: "checkbox", "aria-label": "tick frame " + f.frame,
                                checked: S.picked.has(f.frame) ? true : null});
      tick.addEventListener("click", (ev) => {
        ev.stopPropagation();
        if (tick.checked) S.picked.add(f.frame); else S.picked.delete(f.frame);
        document.getElementById("picked-count").textContent = S.picked.size;
      });
      const cell = el("div", {class: "cell st-" + f.state + (f.frame === S.sel ? " sel" : ""),
                             "data-frame": f.frame,
                             role: "option", tabindex: "0", "aria-selected": String(f.frame === S.sel),
                             title: "frame " + f.frame + ": " + L.WORDS[f.state] + ", " + f.held + " of " + f.target + " samples, " + noiseText(f.noise)},
        el("div", {class: "c-top"}, tick, el("span", {class: "c-num", text: f.frame})),
        thumbOf(f),
        el("div", {class: "c-state"}, L.icon(f.state), el("span", {class: "c-word", text: L.WORDS[f.state]})),
        el("div", {class: "c-noise"}, chip, el("span", {text: noiseText(f.noise)})),
        el("div", {class: "c-spp", text: f.held + "/" + f.target}));
      const choose = () => select(f.frame);
      cell.addEventListener("click", choose);
      cell.addEventListener("keydown", (ev) => { if (ev.key === "Enter" || ev.key === " ") { ev.preventDefault(); choose(); } });
      return cell;
    });
    strip.replaceChildren(...cells);
    // every frame at once as a thin band (a pointer into the strip; the cells carry the words)
    const ribbon = document.getElementById("ribbon");
    ribbon.hidden = S.frames.length < 16;
    ribbon.replaceChildren(...S.frames.map(f => {
      const seg = el("span", {class: "seg st-" + f.state + (f.frame === S.sel ? " sel" : ""),
                              title: "frame " + f.frame + ": " + L.WORDS[f.state]});
      seg.addEventListener("click", () => select(f.frame));
      return seg;
    }));
    const cur = strip.querySelector(".sel");
    if (cur && !S.stripScrolled) { cur.scrollIntoView({block: "nearest", inline: "center"}); S.stripScrolled = true; }
  }

  /* the strip's small pictures: one <img> per frame, kept between polls (its address names the
     frame file's version and the exposure, so it is fetched again only when either changes) */
  function thumbOf(f) {
    const ratio = S.layout ? S.layout.width + " / " + S.layout.height : "16 / 9";
    if (f.exr === null || f.exr === undefined) {
      const none = el("div", {class: "c-pic none", text: "no pixels yet"});
      none.style.aspectRatio = ratio;
      return none;
    }
    const src = files + f.frame + "/thumb.jpg?exposure=" + S.exposure + "&v=" + f.exr;
    let img = S.thumbs.get(f.frame);
    if (!img) {
      img = el("img", {class: "c-pic", alt: "frame " + f.frame, loading: "lazy", decoding: "async"});
      S.thumbs.set(f.frame, img);
    }
    img.style.aspectRatio = ratio;
    if (img.getAttribute("src") !== src) img.src = src;
    return img;
  }

  function select(frame) {
    S.sel = frame; S.tile = null; S.stripScrolled = false;
    history.replaceState(null, "", "#frame=" + frame);
    document.getElementById("sel-frame").textContent = frame;
    renderStrip();
    loadDetail();
  }

  /* ---------------- the chosen frame ---------------- */
  async function loadDetail() {
    if (S.sel === null) return;
    const want = S.sel;
    const d = await L.get(base + "/frames/" + want);
    if (want !== S.sel) return;
    S.detail = d;
    renderFrame();
  }

  function renderFrame() {
    const d = S.detail;
    const img = document.getElementById("preview");
    const none = document.getElementById("no-preview");
    const exr = d.files && d.files.exr;
    none.hidden = !!exr;
    img.hidden = !exr;
    renderLayers(d);
    if (exr) {
      const url = pictureURL(S.sel, exr.mtime, S.layer && d.layers.includes(S.layer) ? S.layer : null);
      if (url !== S.imgKey) { S.imgKey = url; img.src = url; }
    }
    drawTiles();
    const noisy = d.tiles.filter(t => t.state !== "done").length;
    document.getElementById("frame-facts").replaceChildren(
      fact("state", L.WORDS[d.state]),
      fact("samples per pixel", d.held + " of " + d.target + (d.held < d.target ? " (lowest tile)" : "")),
      fact("noise", d.noise === null ? "not known yet" : L.pct(d.noise, 2), "noise-fact"),
      fact("tiles", d.tiles.length + (noisy ? " · " + noisy + " to go" : " · all done")));
    const facts = document.getElementById("frame-facts");
    facts.dataset.frame = d.frame;
    facts.dataset.noise = d.noise === null ? "" : d.noise;
    facts.dataset.held = d.held;
    for (const [id, ext] of [["dl-exr", "exr"], ["dl-png", "png"]]) {
      const a = document.getElementById(id);
      const f = d.files && d.files[ext];
      a.classList.toggle("disabled", !f);
      if (f) { a.href = files + S.sel + "." + ext; a.removeAttribute("aria-disabled"); }
      else { a.removeAttribute("href"); a.setAttribute("aria-disabled", "true"); }
    }
    const spp = document.querySelector("#refine input[name=samples]");
    if (!spp.value || spp.dataset.frame !== String(S.sel)) { spp.value = d.target * 2; spp.dataset.frame = S.sel; }
    renderFailures(d);
    renderTileInfo();
  }

  /* ---------------- layers ---------------- */
  const DATA_LAYERS = ["normal", "depth", "variance"];
  const LAYER_WORDS = {denoised: "denoised", beauty: "beauty (the raw mean)", albedo: "albedo",
                       normal: "normal", depth: "depth", variance: "variance (noise)"};
  const LAYER_NOTES = {
    denoised: "The frame through the denoiser, exposed and through the sRGB curve.",
    beauty: "The unbiased mean of the samples, before the denoiser, exposed and through the sRGB curve.",
    albedo: "The colour of the first surface each sample hit, exposed and through the sRGB curve.",
    normal: "The first surface's normal N shown as colour 0.5 + 0.5·N (x red, y green, z blue); nothing hit is mid grey. Exposure does not apply.",
    depth: "Distance to the first surface: the nearest white, the farthest black, nothing hit black. Exposure does not apply.",
    variance: "Each pixel's standard error, √(variance ÷ samples), white at the frame's 99th percentile and above; pixels under 2 samples black. Exposure does not apply."};
  function layerWord(name) {
    if (LAYER_WORDS[name]) return LAYER_WORDS[name];
    const g = /^group_(.+)$/.exec(name);
    return g ? "light group " + g[1].replace(/_/g, " ") : name.replace(/_/g, " ");
  }
  function pictureURL(frame, mtime, layer, width) {
    return files + frame + "/preview.png?exposure=" + (layer && DATA_LAYERS.includes(layer) ? 0 : S.exposure) +
           (layer ? "&layer=" + encodeURIComponent(layer) : "") + (width ? "&width=" + width : "") + "&v=" + mtime;
  }
  function renderLayers(d) {
    const pick = document.getElementById("layer");
    const have = d.layers || [];
    const want = have.length ? have : ["–"];
    const now = [...pick.options].map(o => o.value);
    if (now.join() !== want.join()) {
      pick.replaceChildren(...want.map(n => el("option", {value: n, text: n === "–" ? "–" : layerWord(n)})));
    }
    pick.disabled = !have.length;
    const shown = S.layer && have.includes(S.layer) ? S.layer : (have.includes("denoised") ? "denoised" : have[0]);
    if (shown) pick.value = shown;
    document.getElementById("exposure").disabled = DATA_LAYERS.includes(shown);
    const note = document.getElementById("layer-note");
    note.textContent = !shown ? "" : (LAYER_NOTES[shown] || "A layer of the frame file, exposed and through the sRGB curve.") +
      (S.layer && !have.includes(S.layer) ? " This frame has no " + layerWord(S.layer) + " layer yet." : "");
    document.getElementById("stage").dataset.layer = shown || "";
  }

  function renderFailures(d) {
    const box = document.getElementById("failures");
    if (!d.failed.length) { box.replaceChildren(); return; }
    box.replaceChildren(
      el("h3", {}, L.icon("failed"), " Failed batches of this frame"),
      ...d.failed.map((f, k) => {
        const [, , tile, first, count] = f.batch.split("/").slice(-5);
        // one button per tile: retrying a tile queues all of its failed batches
        const firstOfTile = d.failed.findIndex(g => g.batch.split("/").slice(-3)[0] === tile) === k;
        return el("div", {class: "failure"},
          el("div", {class: "f-head"}, el("strong", {text: "tile " + tile}), " samples " + first + "–" + (Number(first) + Number(count) - 1),
             firstOfTile ? el("button", {type: "button", class: "warn small", onclick: () => act("retry", {frame: S.sel, tile: Number(tile)}, "Tile " + tile + " is queued again.")}, "Retry tile") : null),
          el("pre", {text: f.error}));
      }),
      el("button", {type: "button", class: "warn", onclick: () => act("retry", {frame: S.sel}, "Frame " + S.sel + "'s failed work is queued again.")}, "Retry this frame's failed work"));
  }

  /* tile map over the preview */
  const COL = {done: "#009E73", rendering: "#56B4E9", failed: "#D55E00", waiting: "#BBBBBB"};
  function drawTiles() {
    const img = document.getElementById("preview");
    const cv = document.getElementById("tiles");
    const d = S.detail, lay = S.layout;
    if (!d || !lay) return;
    const stage = document.getElementById("stage");
    // as wide as the card allows, but no taller than about 60 % of the window
    const box = getComputedStyle(stage.parentElement);
    const room = stage.parentElement.clientWidth - parseFloat(box.paddingLeft) - parseFloat(box.paddingRight);
    const w = Math.round(Math.min(room, 0.6 * window.innerHeight * lay.width / lay.height));
    const h = Math.round(w * lay.height / lay.width);
    stage.style.width = w + "px";
    stage.style.height = h + "px";
    img.classList.toggle("coarse", w >= 2 * lay.width);
    document.getElementById("movie").classList.toggle("coarse", w >= 2 * lay.width);
    const dpr = window.devicePixelRatio || 1;
    cv.width = Math.round(w * dpr); cv.height = Math.round(h * dpr);
    cv.style.width = w + "px"; cv.style.height = h + "px";
    const g = cv.getContext("2d");
    g.setTransform(dpr, 0, 0, dpr, 0, 0);
    g.clearRect(0, 0, w, h);
    const sx = w / lay.width, sy = h / lay.height;
    renderLegend();
    if (P.playing || (S.overlay === "none" && img.hidden === false)) return;
    for (const t of d.tiles) {
      const x = t.x * sx, y = t.y * sy, tw = t.w * sx, th = t.h * sy;
      if (S.overlay === "noise") {
        if (t.noise === null) { hatch(g, x, y, tw, th); }
        else { g.globalAlpha = 0.62; g.fillStyle = L.noiseColour(t.noise); g.fillRect(x, y, tw, th); g.globalAlpha = 1; }
        g.strokeStyle = "rgba(0,0,0,.35)"; g.lineWidth = 1; g.strokeRect(x + .5, y + .5, tw - 1, th - 1);
      } else {
        mark(g, t.state, x, y, tw, th, t);
      }
      if (S.tile === t.tile) { g.strokeStyle = "#F0E442"; g.lineWidth = 3; g.strokeRect(x + 1.5, y + 1.5, tw - 3, th - 3); }
    }
  }
  function hatch(g, x, y, w, h) {
    g.save(); g.beginPath(); g.rect(x, y, w, h); g.clip();
    g.fillStyle = "rgba(40,40,40,.45)"; g.fillRect(x, y, w, h);
    g.strokeStyle = "rgba(255,255,255,.5)"; g.lineWidth = 1;
    for (let k = -h; k < w; k += 6) { g.beginPath(); g.moveTo(x + k, y + h); g.lineTo(x + k + h, y); g.stroke(); }
    g.restore();
  }
  /* states differ in shape as well as colour: veil + dotted edge (waiting), bold edge with a
     half disc (rendering), thin edge with a tick (done), edge with a cross (failed) */
  function mark(g, state, x, y, w, h, t) {
    const c = COL[state];
    const r = Math.max(3, Math.min(7, Math.min(w, h) / 6));
    g.save();
    if (state === "waiting") {
      g.fillStyle = "rgba(20,24,30,.5)"; g.fillRect(x, y, w, h);
      if (t.held > 0) { g.fillStyle = "rgba(20,24,30,.5)"; }
      g.setLineDash([3, 3]); g.strokeStyle = c; g.lineWidth = 1; g.strokeRect(x + .5, y + .5, w - 1, h - 1);
    } else if (state === "rendering") {
      g.strokeStyle = c; g.lineWidth = 2.5; g.strokeRect(x + 1.25, y + 1.25, w - 2.5, h - 2.5);
      g.fillStyle = c; g.beginPath(); g.arc(x + r + 4, y + r + 4, r, -Math.PI / 2, Math.PI / 2); g.fill();
      g.beginPath(); g.lineWidth = 1.5; g.arc(x + r + 4, y + r + 4, r, 0, 2 * Math.PI); g.stroke();
    } else if (state === "failed") {
      g.fillStyle = "rgba(213,94,0,.25)"; g.fillRect(x, y, w, h);
      g.strokeStyle = c; g.lineWidth = 2.5; g.strokeRect(x + 1.25, y + 1.25, w - 2.5, h - 2.5);
      g.beginPath(); g.moveTo(x + 3, y + 3); g.lineTo(x + w - 3, y + h - 3); g.moveTo(x + w - 3, y + 3); g.lineTo(x + 3, y + h - 3); g.stroke();
    } else {
      g.strokeStyle = "rgba(0,158,115,.55)"; g.lineWidth = 1; g.strokeRect(x + .5, y + .5, w - 1, h - 1);
      g.strokeStyle = c; g.lineWidth = 2; g.beginPath();
      g.moveTo(x + 4, y + 4 + r); g.lineTo(x + 4 + r * .7, y + 4 + r * 1.6); g.lineTo(x + 4 + r * 1.8, y + 4); g.stroke();
    }
    g.restore();
  }

  function renderLegend() {
    const box = document.getElementById("legend");
    if (S.overlay === "noise") {
      const bar = el("span", {class: "ramp", role: "img", "aria-label": "noise scale from 0.5 % to 50 %"});
      const stops = [];
      for (let i = 0; i <= 10; i++) stops.push(L.viridis(i / 10) + " " + (i * 10) + "%");
      bar.style.background = "linear-gradient(to right, " + stops.join(", ") + ")";
      const ticks = el("span", {class: "ticks"}, ...[0.005, 0.016, 0.05, 0.16, 0.5].map(v => el("span", {text: L.pct(v, v < 0.01 ? 1 : 0)})));
      box.replaceChildren(el("span", {class: "lg-title", text: "relative noise of each tile (log scale)"}),
                          el("span", {class: "ramp-wrap"}, bar, ticks),
                          el("span", {class: "lg-item"}, el("span", {class: "sw hatch"}), "not known yet (under 2 samples)"));
    } else if (S.overlay === "state") {
      box.replaceChildren(...["waiting", "rendering", "done", "failed"].map(s =>
        el("span", {class: "lg-item st-" + s}, L.icon(s), L.WORDS[s])));
    } else box.replaceChildren();
  }

  function tileAt(ev) {
    const cv = document.getElementById("tiles"), r = cv.getBoundingClientRect();
    const px = (ev.clientX - r.left) / r.width * S.layout.width, py = (ev.clientY - r.top) / r.height * S.layout.height;
    return S.detail.tiles.find(t => px >= t.x && px < t.x + t.w && py >= t.y && py < t.y + t.h);
  }
  function renderTileInfo() {
    const box = document.getElementById("tile-info");
    const t = S.detail && S.tile !== null ? S.detail.tiles[S.tile] : null;
    if (!t) { box.textContent = "Tap a tile for its numbers."; return; }
    box.replaceChildren(L.badge(t.state), " tile " + t.tile + " · " + t.held + " of " + t.target +
      " samples · noise " + (t.noise === null ? "not known yet" : L.pct(t.noise, 2)));
  }

  /* ---------------- actions ---------------- */
  async function act(op, body, done) {
    try {
      const res = await L.post(base + "/" + op, body);
      L.say(done || res.message, "good");
      setTimeout(refresh, 600);
    } catch (e) { L.say(e.message, "bad", 6000); }
  }

  function wire() {
    document.getElementById("act-pause").addEventListener("click", () => act("pause"));
    document.getElementById("act-resume").addEventListener("click", () => act("resume"));
    document.getElementById("act-prio").addEventListener("click", () =>
      act("priority", {priority: Number(document.getElementById("prio").value)}));
    document.getElementById("act-retry").addEventListener("click", () => act("retry", {}));
    document.getElementById("act-cancel").addEventListener("click", () => {
      if (confirm("Cancel " + S.job.name + "? Frames already written stay on disk.")) act("cancel");
    });
    const setPicked = (frames) => {
      S.picked = new Set(frames);
      document.getElementById("picked-count").textContent = S.picked.size;
      renderStrip();
    };
    document.getElementById("tick-none").addEventListener("click", () => setPicked([]));
    document.getElementById("tick-noisy").addEventListener("click", () => {
      const known = S.frames.filter(f => f.noise !== null).sort((a, b) => b.noise - a.noise);
      setPicked(known.slice(0, Math.max(1, Math.ceil(known.length / 4))).map(f => f.frame));
      document.querySelector("#refine input[name=where][value=picked]").checked = true;
    });
    document.getElementById("strip").addEventListener("keydown", (ev) => {
      const step = {ArrowLeft: -1, ArrowRight: 1}[ev.key];
      const i = S.frames.findIndex(f => f.frame === S.sel);
      if (!step || i < 0 || !S.frames[i + step]) return;
      ev.preventDefault();
      select(S.frames[i + step].frame);
      const cur = document.querySelector("#strip .sel");
      if (cur) cur.focus();
    });
    const ex = document.getElementById("exposure");
    const setExposure = (v) => {
      S.exposure = Number(v); ex.value = v;
      document.getElementById("exposure-out").textContent = (S.exposure >= 0 ? "+" : "") + S.exposure.toFixed(1);
      if (S.detail) renderFrame();
      renderStrip();
      if (P.playing) play(false);
    };
    ex.addEventListener("input", () => setExposure(ex.value));
    document.getElementById("exposure-reset").addEventListener("click", () => setExposure(0));
    const pick = document.getElementById("layer");
    pick.addEventListener("change", () => {
      S.layer = pick.value === "denoised" ? null : pick.value;
      if (S.detail) renderFrame();
      if (P.playing) play(false);
    });
    document.getElementById("play").addEventListener("click", () => (P.playing || P.loading) ? pause() : play(true));
    document.getElementById("step-back").addEventListener("click", () => step(-1));
    document.getElementById("step-on").addEventListener("click", () => step(1));
    document.addEventListener("keydown", (ev) => {
      // typing in a field, or the strip (its arrows choose frames), keeps its keys; a focused
      // button takes the space bar itself
      const t = ev.target;
      if (ev.altKey || ev.ctrlKey || ev.metaKey || (t && t.closest && t.closest("input, select, textarea, #strip"))) return;
      if (ev.key === " " && !(t && t.closest && t.closest("button, a"))) { ev.preventDefault(); (P.playing || P.loading) ? pause() : play(true); }
      else if (ev.key === "ArrowLeft") { ev.preventDefault(); step(-1); }
      else if (ev.key === "ArrowRight") { ev.preventDefault(); step(1); }
    });
    for (const r of document.querySelectorAll("input[name=overlay]"))
      r.addEventListener("change", () => { S.overlay = r.value; drawTiles(); });
    const cv = document.getElementById("tiles");
    cv.addEventListener("click", (ev) => {
      const t = S.detail && tileAt(ev);
      S.tile = t ? t.tile : null; drawTiles(); renderTileInfo();
    });
    document.getElementById("preview").addEventListener("load", drawTiles);
    window.addEventListener("resize", drawTiles);
    const form = document.getElementById("refine");
    form.addEventListener("submit", async (ev) => {
      ev.preventDefault();
      const fd = new FormData(form);
      const body = {samples: Number(fd.get("samples"))};
      const where = fd.get("where");
      if (where === "frame") body.frames = [S.sel];
      else if (where === "picked") {
        if (!S.picked.size) { L.say("Tick one or more frames in the strip first.", "bad"); return; }
        body.frames = [...S.picked].sort((a, b) => a - b);
      } else body.noise = Number(fd.get("noise")) / 100;
      const msg = document.getElementById("refine-msg");
      try {
        const res = await L.post(base + "/refine", body);
        msg.textContent = res.message; msg.className = "form-msg good";
        setTimeout(refresh, 600);
      } catch (e) { msg.textContent = e.message; msg.className = "form-msg bad"; }
    });
  }

  /* ---------------- playing the shot ----------------
     The frames written so far, at the shot's fps, from the same pictures as the frame view
     (layer and exposure as chosen). Every picture is fetched and decoded before the first is
     shown, so playback does not wait on the network; frames without a file yet are left out,
     and the line beside the buttons says how many. Pictures are drawn on a canvas above the
     preview, one after another at the shot's fps. */
  const P = {playing: false, loading: false, list: [], pics: [], at: 0, due: 0, fps: 24, timer: 0, gen: 0};

  function fpsOf() { return S.layout && S.layout.fps > 0 ? S.layout.fps : 24; }

  async function play(fromSel) {
    const gen = ++P.gen;
    const keep = P.playing ? P.list[P.at] : null;
    stopClock();
    P.loading = true; P.playing = false;
    const ready = S.frames.filter(f => f.exr !== null && f.exr !== undefined);
    const left = S.frames.length - ready.length;
    const info = document.getElementById("play-info");
    document.getElementById("play").textContent = "Pause";
    if (!ready.length) { P.loading = false; document.getElementById("play").textContent = "Play"; info.textContent = "No frame has been written yet."; return; }
    let loaded = 0;
    info.textContent = "loading 0 of " + ready.length + " pictures";
    const layer = S.layer;
    // as wide as the picture on the screen needs (the server's sizes for playing: 480, 960),
    // full size when the frame is narrower or the screen wider
    const need = document.getElementById("stage").clientWidth * (window.devicePixelRatio || 1);
    const width = [480, 960].find(w => w >= need && S.layout && w < S.layout.width) || null;
    const pics = await Promise.all(ready.map(async f => {
      const im = new Image();
      im.src = pictureURL(f.frame, f.exr, layer, width);
      try { await im.decode(); } catch (e) { return null; }
      if (gen === P.gen) info.textContent = "loading " + (++loaded) + " of " + ready.length + " pictures";
      return im;
    }));
    if (gen !== P.gen) return;  // paused, or started again, meanwhile
    P.list = ready.map(f => f.frame).filter((_, k) => pics[k]);
    P.pics = pics.filter(Boolean);
    const unreadable = ready.length - P.pics.length;  // e.g. a layer only some frames hold
    P.loading = false;
    if (!P.pics.length) { pause(); info.textContent = "No picture of this layer could be loaded."; return; }
    P.fps = fpsOf();
    const start = keep !== null ? keep : (fromSel ? S.sel : null);
    P.at = Math.max(0, P.list.indexOf(start));
    P.playing = true;
    P.missing = left; P.unreadable = unreadable;
    const cv = document.getElementById("movie");
    cv.width = P.pics[0].naturalWidth; cv.height = P.pics[0].naturalHeight;
    cv.hidden = false;
    document.getElementById("tiles").hidden = true;
    document.getElementById("stage").classList.add("playing");
    showMovie(P.at);
    P.due = performance.now() + 1000 / P.fps;
    P.timer = setTimeout(tick, 1000 / P.fps);
  }

  /* every frame in turn, each for 1/fps: a browser that falls behind plays slower rather than
     skip a frame (a skipped frame could be the one that flickers) */
  function tick() {
    if (!P.playing) return;
    showMovie((P.at + 1) % P.list.length);
    const now = performance.now();
    P.due = Math.max(P.due + 1000 / P.fps, now + 1);
    P.timer = setTimeout(tick, P.due - now);
  }

  function showMovie(k) {
    P.at = k;
    const cv = document.getElementById("movie"), g = cv.getContext("2d");
    g.imageSmoothingEnabled = false;
    g.drawImage(P.pics[k], 0, 0, cv.width, cv.height);
    const frame = P.list[k];
    document.getElementById("sel-frame").textContent = frame;
    document.getElementById("stage").dataset.shown = frame;
    for (const c of document.querySelectorAll("#strip .cell")) c.classList.toggle("playing-now", Number(c.dataset.frame) === frame);
    const plural = (n, word) => n + " " + word + (n === 1 ? "" : "s");
    document.getElementById("play-info").textContent = "frame " + frame + " · " + plural(P.fps, "frame") + " a second · " +
      plural(P.list.length, "frame") + " written" + (P.missing ? ", " + P.missing + " not written yet (left out)" : "") +
      (P.unreadable ? ", " + P.unreadable + " without this picture (left out)" : "");
  }

  function stopClock() { clearTimeout(P.timer); P.timer = 0; }

  function pause() {
    P.gen++;
    const was = P.playing ? P.list[P.at] : null;
    stopClock();
    P.playing = false; P.loading = false;
    document.getElementById("play").textContent = "Play";
    document.getElementById("movie").hidden = true;
    document.getElementById("tiles").hidden = false;
    document.getElementById("stage").classList.remove("playing");
    delete document.getElementById("stage").dataset.shown;
    for (const c of document.querySelectorAll("#strip .playing-now")) c.classList.remove("playing-now");
    document.getElementById("play-info").textContent = was !== null ? "paused at frame " + was : "";
    if (was !== null) select(was); else drawTiles();
  }

  function step(by) {
    if (P.playing || P.loading) pause();
    const i = S.frames.findIndex(f => f.frame === S.sel);
    const f = S.frames[i + by];
    if (i >= 0 && f) select(f.frame);
  }

  async function refresh() {
    const data = await L.get(base);
    S.job = data.job; S.layout = data.layout; S.frames = data.frames;
    renderHead();
    if (S.sel === null && S.frames.length) {
      const m = /frame=(\d+)/.exec(location.hash);
      const want = m ? Number(m[1]) : null;
      const f = S.frames.find(x => x.frame === want) || S.frames.find(x => x.state === "rendering") || S.frames[0];
      select(f.frame);
      return;
    }
    renderStrip();
    await loadDetail();
  }

  wire();
  L.poll(refresh, 2000);
})();
