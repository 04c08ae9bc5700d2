/* The overview: shots, machines, the last hours; refreshed every two seconds. */
"use strict";
(() => {
  const L = Lampyr, el = L.el;
  const ACTIVE = new Set(["running", "queued", "paused"]);

  function figures(data) {
    const jobs = data.jobs, folded = data.folded || {shots: 0, done: 0, frames: 0};
    const active = jobs.filter(j => ACTIVE.has(j.state));
    const running = jobs.filter(j => j.state === "running").length;
    const n = (k, what) => k + " " + what;
    document.getElementById("fig-shots").textContent = active.length;
    document.getElementById("fig-shots-sub").textContent = [
      n(running, "rendering"), n(active.length - running, "waiting or paused"),
      n(jobs.filter(j => j.state === "done").length + folded.done, "finished"),
      n(jobs.filter(j => j.failed_batches).length, "with failures")].join(" · ");
    // folded shots (finished, older than a day) are counted by the head, not listed
    const counted = jobs.filter(j => j.state !== "cancelled");
    const done = counted.reduce((a, j) => a + j.frames_done, 0) + folded.frames;
    const all = counted.reduce((a, j) => a + j.frames, 0) + folded.frames;
    document.getElementById("fig-frames").textContent = all ? done + " / " + all : "–";
    const last = active.map(j => j.eta_seconds).filter(x => x !== null && x !== undefined);
    document.getElementById("fig-frames-sub").textContent = last.length
      ? "all ready about " + L.clock(data.now + Math.max(...last))
      : (all && done === all ? "everything is rendered" : "of every shot on the farm");
    // merged over the last three minutes (the current one so far and the two before): steadier
    // than the workers' own readings
    const th = data.throughput, v = th.values;
    const into = Math.max(1, data.now - (th.start + (v.length - 1) * th.step));
    const speed = v.slice(-3).reduce((a, b) => a + b, 0) / (2 * th.step + into);
    document.getElementById("fig-speed").textContent = L.count(speed);
    const busy = data.workers.filter(w => w.slots.length).length;
    document.getElementById("fig-machines").textContent = data.workers.length;
    document.getElementById("fig-machines-sub").textContent =
      busy + " rendering · " + (data.workers.length - busy) + " idle · " + data.offline.length + " not heard from";
  }

  function shotRow(j, now) {
    const bar = el("div", {class: "progress"}, el("div", {class: "fill st-" + j.state}));
    bar.firstChild.style.width = (100 * j.progress).toFixed(1) + "%";
    const eta = j.state === "running" && j.eta_seconds !== null
      ? "ready about " + L.clock(now + j.eta_seconds) + " (in " + L.span(j.eta_seconds) + ")"
      : j.state === "done" ? "finished" : "–";
    const LET = {w: "waiting", r: "rendering", d: "done", f: "failed"};
    const band = j.frame_states && j.frame_states.length > 1
      ? el("div", {class: "ribbon small", "aria-hidden": "true"},
           ...[...j.frame_states].map(c => el("span", {class: "seg st-" + LET[c]}))) : null;
    return el("a", {class: "shot", href: "/jobs/" + encodeURIComponent(j.job)},
      el("div", {class: "shot-name"}, L.badge(j.state), el("strong", {text: j.name}), el("span", {class: "jobid", text: j.job})),
      el("div", {class: "shot-bar"}, bar, el("span", {class: "pc", text: L.pct(j.progress, 0)})),
      el("dl", {class: "shot-facts"},
        el("div", {}, el("dt", {text: "frames"}), el("dd", {text: j.frames_done + " / " + j.frames})),
        el("div", {}, el("dt", {text: "samples/px"}), el("dd", {text: j.samples})),
        el("div", {}, el("dt", {text: "speed"}), el("dd", {text: L.count(j.samples_per_second) + "/s"})),
        el("div", {class: "wide"}, el("dt", {text: "when"}), el("dd", {text: eta})),
        el("div", {}, el("dt", {text: "priority"}), el("dd", {text: j.priority})),
        j.failed_batches ? el("div", {class: "bad"}, el("dt", {text: "failed"}), el("dd", {text: j.failed_batches + " batch" + (j.failed_batches > 1 ? "es" : "")})) : null),
      band);
  }

  function machine(w, now) {
    const doing = w.slots.length
      ? w.slots.map(s => el("div", {class: "doing"}, L.icon("rendering"),
          el("a", {href: "/jobs/" + encodeURIComponent(s.job || ""), text: (s.job || "?")}),
          " frame " + s.frame + ", tile " + s.tile))
      : [el("div", {class: "doing idle"}, L.icon(/paus|outside/.test(w.state || "") ? "paused" : "waiting"),
             w.state ? String(w.state) : "idle")];
    return el("div", {class: "machine"},
      el("div", {class: "m-name"}, el("strong", {text: w.name}), el("span", {class: "sub", text: (w.host || "") + " · " + cores(w.cores)})),
      el("div", {class: "m-doing"}, doing),
      el("div", {class: "m-speed"}, el("span", {class: "num", text: L.count(w.pixel_samples_per_second)}), el("span", {class: "sub", text: "samples/s"})),
      el("div", {class: "m-seen sub", text: hours(w, now) + "heard " + L.ago(w.last_seen, now)}));
  }

  /* working hours from the heartbeat's `windows` ([[start, end], ...] epoch seconds), if any */
  function hours(w, now) {
    if (!Array.isArray(w.windows) || !w.windows.length) return "";
    const cur = w.windows.find(([a, b]) => b > now);
    if (!cur) return "no working hours ahead · ";
    const [a, b] = cur;
    return (a <= now ? "renders until " + L.clock(b) : "renders from " + L.clock(a) + " to " + L.clock(b)) + " · ";
  }

  function cores(k) { return k === 1 ? "1 core" : (k || "?") + " cores"; }

  function offline(w, now) {
    return el("div", {class: "machine gone"},
      el("div", {class: "m-name"}, el("strong", {text: w.name}), el("span", {class: "sub", text: (w.host || "") + " · " + cores(w.cores)})),
      el("div", {class: "m-doing"}, el("div", {class: "doing"}, L.icon("cancelled"), "no heartbeat")),
      el("div", {class: "m-speed"}, el("button", {type: "button", class: "quiet small forget",
        title: "take " + w.name + " off this list (it comes back if it joins again)",
        onclick: async (ev) => {
          ev.preventDefault();
          try { L.say((await L.post("/api/workers/" + encodeURIComponent(w.name) + "/forget")).message, "good"); kick(); }
          catch (e) { L.say(e.message, "bad"); }
        }}, "Forget")),
      el("div", {class: "m-seen sub", text: "last heard " + L.ago(w.last_seen, now) + " (" + L.clock(w.last_seen) + ")"}));
  }

  function plot(full) {
    // the window opens at the first hour with work in it (1 to 6 hours), so a farm that
    // started an hour ago is not a flat line with a spike at its end
    const perHour = 3600 / full.step;
    const first = full.values.findIndex(v => v > 0);
    const hoursShown = first < 0 ? 1 : Math.min(full.values.length / perHour,
                                                Math.max(1, Math.ceil((full.values.length - first) / perHour)));
    const th = {...full, values: full.values.slice(-hoursShown * perHour)};
    th.start = full.start + (full.values.length - th.values.length) * full.step;
    document.getElementById("plot-title").textContent =
      "Samples rendered, last " + (hoursShown === 1 ? "hour" : hoursShown + " hours");
    const box = document.getElementById("plot");
    const W = Math.max(200, box.clientWidth), H = 150, pad = 24;
    const per = th.values.map(v => v / th.step);
    const top = Math.max(1, ...per);
    const svgns = "http://www.w3.org/2000/svg";
    const svg = document.createElementNS(svgns, "svg");
    svg.setAttribute("viewBox", "0 0 " + W + " " + (H + pad));
    svg.setAttribute("width", W); svg.setAttribute("height", H + pad);
    const bw = W / per.length;
    per.forEach((v, i) => {
      if (!v) return;
      const r = document.createElementNS(svgns, "rect");
      const h = Math.max(1, (H - 8) * v / top);
      r.setAttribute("x", (i * bw).toFixed(2)); r.setAttribute("width", Math.max(bw, 1).toFixed(2));
      r.setAttribute("y", (H - h).toFixed(2)); r.setAttribute("height", h.toFixed(2));
      r.setAttribute("class", "bar");
      const tip = document.createElementNS(svgns, "title");
      tip.textContent = L.clock(th.start + i * th.step) + ": " + L.count(v) + " samples/s";
      r.append(tip);
      svg.append(r);
    });
    const base = document.createElementNS(svgns, "line");
    base.setAttribute("x1", 0); base.setAttribute("x2", W); base.setAttribute("y1", H); base.setAttribute("y2", H);
    base.setAttribute("class", "axis"); svg.append(base);
    const hours = per.length * th.step / 3600;
    const every = hours <= 2 ? 0.25 : 1;  // hours between two ticks
    for (let k = 0; k * every <= hours + 1e-9; k++) {
      const h = k * every;
      const x = W - h * 3600 / th.step * bw;
      const t = document.createElementNS(svgns, "text");
      t.setAttribute("x", Math.max(14, Math.min(W - 14, x)).toFixed(1)); t.setAttribute("y", H + 18);
      t.setAttribute("class", "tick"); t.setAttribute("text-anchor", "middle");
      t.textContent = h === 0 ? "now" : Number.isInteger(h) ? "−" + h + " h" : "−" + Math.round(h * 60) + " min";
      svg.append(t);
    }
    box.replaceChildren(svg);
    const total = th.values.reduce((a, b) => a + b, 0);
    const recent = per.slice(-10).reduce((a, b) => a + b, 0) / 10;
    document.getElementById("plot-sub").textContent =
      L.count(total) + " samples in all · peak " + L.count(Math.max(0, ...per)) + "/s · last 10 min " + L.count(recent) + "/s";
  }

  async function refresh() {
    // the head folds finished shots older than a day away unless asked for all of them
    const data = await L.get(showAll ? "/api/farm?all=1" : "/api/farm");
    figures(data);
    const shots = document.getElementById("shots");
    const old = (j) => !ACTIVE.has(j.state) && j.state !== "failed" && data.now - j.submitted > 86400;
    const shown = data.jobs;
    const hidden = data.folded ? data.folded.shots : 0;
    const more = hidden || showAll && data.jobs.some(old)
      ? el("button", {type: "button", class: "quiet small", onclick: () => { showAll = !showAll; kick(); }},
           showAll ? "Fold away finished shots older than a day" : "Show " + hidden + " finished shot" + (hidden > 1 ? "s" : "") + " older than a day")
      : null;
    shots.replaceChildren(...(shown.length ? shown.map(j => shotRow(j, data.now))
                                           : [el("p", {class: "empty", text: "Nothing on the farm yet."})]), ...(more ? [more] : []));
    const m = document.getElementById("machines");
    m.replaceChildren(...(data.workers.length ? data.workers.map(w => machine(w, data.now))
                                               : [el("p", {class: "empty", text: "No machine has joined yet."})]));
    const o = document.getElementById("offline");
    o.replaceChildren(...(data.offline.length ? data.offline.map(w => offline(w, data.now))
                                               : [el("p", {class: "empty", text: "None."})]));
    plot(data.throughput);
    lastPlot = data.throughput;
  }
  let lastPlot = null;
  let showAll = false;
  window.addEventListener("resize", () => { if (lastPlot) plot(lastPlot); });
  const kick = L.poll(refresh, 2000);

  const panel = document.getElementById("submit-panel");
  const opener = document.getElementById("open-submit");
  opener.addEventListener("click", () => {
    panel.hidden = !panel.hidden;
    opener.setAttribute("aria-expanded", String(!panel.hidden));
  });
  panel.addEventListener("submit", async (ev) => {
    ev.preventDefault();
    const msg = document.getElementById("submit-msg");
    const btn = panel.querySelector("button[type=submit]");
    btn.disabled = true;
    msg.className = "form-msg"; msg.textContent = "Uploading…";
    try {
      const res = await L.post("/api/submit", new FormData(panel));
      msg.textContent = res.message;
      msg.classList.add("good");
      panel.reset();
      kick();
    } catch (e) {
      msg.textContent = e.message;
      msg.classList.add("bad");
    } finally { btn.disabled = false; }
  });
})();
