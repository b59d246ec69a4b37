// clampd station view: reads /events (server-sent events), keeps one picture, redraws it.
// Read-only: the page never sends anything but GET requests. No libraries, no network beyond
// this origin. window.clampdView exposes counters and latencies for tests and measurements.
"use strict";

(function () {
  const SVGNS = "http://www.w3.org/2000/svg";
  const RESULTS_SHOWN = 12;
  const LATENCY_KEEP = 5000;
  const stats = { applied: 0, snapshots: 0, resyncs: 0, latencies: [], byType: {}, errors: 0 };
  window.clampdView = stats;

  // ?wrench=ID pins the page to one wrench (a station screen beside that tool); without it
  // the page follows the wrench whose rundown began last.
  const pinned = new URLSearchParams(location.search).get("wrench");
  let state = null;
  let lastSeq = -1;
  let curveDirty = true;

  const $ = (id) => document.getElementById(id);
  const fmt = (x, digits) => (x === null || x === undefined ? "-" : Number(x).toFixed(digits));
  const words = (code) => String(code).replace(/_/g, " ");

  function el(tag, attrs, text) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, v);
    if (text !== undefined) e.textContent = text;
    return e;
  }
  function sv(tag, attrs, text) {
    const e = document.createElementNS(SVGNS, tag);
    for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, v);
    if (text !== undefined) e.textContent = text;
    return e;
  }

  // -- the picture -------------------------------------------------------------------------
  function focusId() {
    if (!state) return null;
    if (pinned) return pinned;
    if (state.focus) return state.focus;
    const ids = Object.keys(state.wrenches);
    return ids.length ? ids[0] : null;
  }
  function jobFor(wrenchId) {
    if (!state) return null;
    return state.jobs.find((j) => j.wrench_id === wrenchId) ||
      state.jobs.find((j) => j.wrench_id === null) || null;
  }

  function apply(msg) {
    switch (msg.type) {
      case "station": state.station = msg.value; break;
      case "jobs": state.jobs = msg.value; curveDirty = true; break;
      case "wrench": state.wrenches[msg.value.id] = msg.value; break;
      case "broker": state.broker = msg.value; break;
      case "rundown":
        state.rundowns[msg.value.wrench_id] = msg.value;
        state.focus = msg.value.wrench_id;
        curveDirty = true;
        break;
      case "points": {
        const r = state.rundowns[msg.wrench_id];
        if (!r || r.id !== msg.id || r.epoch !== msg.epoch || r.points.length !== msg.from) {
          return false; // out of step: fetch the whole picture again
        }
        for (const p of msg.points) r.points.push(p);
        r.torque_nm = msg.torque_nm;
        r.angle_deg = msg.angle_deg;
        curveDirty = true;
        break;
      }
      case "mark": {
        const r = state.rundowns[msg.wrench_id];
        if (!r || r.id !== msg.id) return false;
        r.marks.push(msg.value);
        curveDirty = true;
        break;
      }
      case "result":
        state.results.unshift(msg.value);
        state.results.length = Math.min(state.results.length, RESULTS_SHOWN);
        break;
      default:
        return true; // a newer server's message: ignore what we cannot show
    }
    return true;
  }

  function render() {
    const focus = focusId();
    const job = jobFor(focus);
    const st = state.station;
    $("station-name").textContent = st.id;
    $("station-title").textContent = st.name;
    $("program").textContent = job ? `${job.limits.program_id} v${job.limits.program_version}` : "-";
    $("part").textContent = job ? job.part_id : "-";
    renderWrenches();
    renderBroker();
    renderJoints(job);
    renderVerdict(focus, job);
    renderResults();
    const r = focus ? state.rundowns[focus] : null;
    const fin = r && r.final;
    $("readout-kind").textContent = fin ? "final" : "live";
    $("torque").textContent = fin ? fmt(fin[1], 1) : r ? fmt(r.torque_nm, 1) : "-";
    $("angle").textContent = fin ? fmt(fin[0], 0) : r ? fmt(r.angle_deg, 0) : "-";
    $("wrench-focus").textContent = focus ? `wrench ${focus}` : "";
    if (curveDirty) {
      drawCurve(r, job);
      curveDirty = false;
    }
  }

  function renderWrenches() {
    const ul = $("wrenches");
    ul.replaceChildren();
    for (const w of Object.values(state.wrenches)) {
      const li = el("li", { class: "chip", "data-state": w.connected ? "up" : "down", "data-wrench": w.id });
      if (w.id === pinned) li.classList.add("pinned");
      li.append(el("span", { class: "glyph", "aria-hidden": "true" }));
      const parts = [w.id, w.connected ? "" : "no link"];
      if (w.connected && w.battery_pct !== null) parts.push(`${w.battery_pct}%`);
      li.title = `wrench ${w.id}: ${w.connected ? "linked" : "no link"}` +
        (w.battery_pct !== null ? `, battery ${w.battery_pct}%` : "") +
        `, calibration ${words(w.calibration)}` + (w.calibration_due ? ` (due ${w.calibration_due})` : "");
      const link = el("a", { href: w.id === pinned ? "?" : `?wrench=${encodeURIComponent(w.id)}`, class: "text" },
        parts.filter((x) => x).join(" "));
      li.append(link);
      if (w.calibration !== "ok") {
        const due = w.calibration_due ? ` ${w.calibration_due}` : "";
        li.append(el("span", { class: "warn" }, `cal ${words(w.calibration)}${due}`));
      }
      if (w.locked) li.append(el("span", { class: "warn" }, "locked"));
      ul.append(li);
    }
  }

  function renderBroker() {
    const b = state.broker;
    const chip = $("broker");
    chip.dataset.state = b.connected ? "up" : "down";
    const backlog = b.backlog === null ? "?" : b.backlog;
    chip.querySelector(".text").textContent =
      `broker ${b.connected ? "up" : "offline"} · ${backlog} queued`;
  }

  function renderJoints(job) {
    const ol = $("joints");
    ol.replaceChildren();
    if (!job) {
      $("joint-count").textContent = "(no part selected)";
      return;
    }
    const done = job.joints.filter((j) => j.state !== "pending").length;
    $("joint-count").textContent = `${done}/${job.joints.length}`;
    for (const j of job.joints) {
      const li = el("li", { "data-state": j.state, "data-position": j.position });
      if (j.position === job.next_position) li.classList.add("next");
      li.append(el("span", {}, j.position));
      const label = j.state === "pending" ? (j.position === job.next_position ? "next" : "") : j.state.toUpperCase();
      li.append(el("span", { class: "st" }, label));
      ol.append(li);
    }
  }

  function renderVerdict(focus, job) {
    const r = focus ? state.rundowns[focus] : null;
    let status = "idle", big = "READY", detail = "waiting for a rundown";
    if (job && job.next_position) detail = `next joint ${job.next_position}`;
    if (job && !job.next_position) detail = "every joint of this part has a result";
    if (job && job.locked) { big = "LOCKED"; detail = "the station refuses rundowns"; }
    if (r && r.phase === "running") {
      status = "running"; big = "RUNNING";
      detail = `${fmt(r.torque_nm, 1)} N·m`;
    } else if (r && r.status) {
      status = r.status; big = r.status;
      detail = r.status === "OK" ? "within every window" : r.reasons.map(words).join(", ");
    }
    const v = $("verdict");
    v.dataset.status = status;
    $("verdict-text").textContent = big;
    $("verdict-detail").textContent = detail;
    $("verdict-shape").setAttribute("href", `#s-${status === "OK" ? "ok" : status === "NOK" ? "nok" : status}`);
  }

  function renderResults() {
    const ol = $("results");
    ol.replaceChildren();
    for (const x of state.results) {
      const li = el("li", { "data-status": x.status, "data-id": x.id, title: `part ${x.part_id}, wrench ${x.wrench_id}` });
      li.append(el("span", { class: "st" }, `${x.status === "OK" ? "\u25CF" : "\u25A0"} ${x.status}`));
      li.append(document.createTextNode(` ${x.joint_position}`));
      li.append(el("span", { class: "key" }, ` ${x.part_id}`));
      li.append(el("br"));
      const angle = x.final_angle_deg === null ? "" : ` · ${fmt(x.final_angle_deg, 0)}°`;
      const why = x.status === "OK" ? "" : ` · ${x.reasons.map(words).join(", ")}`;
      li.append(document.createTextNode(`${fmt(x.final_torque_nm, 1)} N·m${angle}${why}`));
      ol.append(li);
    }
  }

  // -- the curve ---------------------------------------------------------------------------
  function niceStep(span, target) {
    const raw = span / target;
    const mag = Math.pow(10, Math.floor(Math.log10(raw)));
    for (const m of [1, 2, 5, 10]) if (m * mag >= raw) return m * mag;
    return 10 * mag;
  }

  function drawCurve(r, job) {
    const svg = $("curve");
    const box = svg.getBoundingClientRect();
    const W = Math.max(200, box.width), H = Math.max(120, box.height);
    svg.setAttribute("viewBox", `0 0 ${W} ${H}`);
    for (const n of Array.from(svg.childNodes)) if (n.nodeName !== "title") svg.removeChild(n);
    const L = (r && r.limits) || (job && job.limits) || null;
    const pts = r ? r.points : [];
    // Angle: zoom on what matters (the curve, the angle targets, where the window opens);
    // a window reaching past the right edge is drawn open there. Torque: the whole window.
    let amax = 10, tmax = 5;
    for (const p of pts) {
      if (p[0] !== null && p[0] * 1.3 > amax) amax = p[0] * 1.3;
      if (p[1] > tmax) tmax = p[1];
    }
    if (L) {
      for (const a of L.targets_deg) amax = Math.max(amax, a * 1.15);
      if (L.angle_window) amax = Math.max(amax, L.angle_window[0] * 1.3);
      for (const t of L.targets_nm) tmax = Math.max(tmax, t);
      if (L.torque_window) tmax = Math.max(tmax, L.torque_window[1]);
      tmax = Math.max(tmax, L.snug_nm);
    }
    tmax *= 1.12;
    const m = { l: 48, r: 12, t: 10, b: 30 };
    const X = (a) => m.l + (Math.min(Math.max(0, a), amax) / amax) * (W - m.l - m.r);
    const Y = (t) => H - m.b - (t / tmax) * (H - m.t - m.b);
    const g = sv("g");
    const xs = niceStep(amax, W > 900 ? 10 : 6), ys = niceStep(tmax, H > 500 ? 8 : 5);
    for (let a = 0; a <= amax; a += xs) {
      g.append(sv("line", { class: "grid-line", x1: X(a), x2: X(a), y1: m.t, y2: H - m.b }));
      g.append(sv("text", { class: "tick", x: X(a), y: H - m.b + 14, "text-anchor": "middle" }, String(+a.toFixed(3))));
    }
    for (let t = 0; t <= tmax; t += ys) {
      g.append(sv("line", { class: "grid-line", x1: m.l, x2: W - m.r, y1: Y(t), y2: Y(t) }));
      g.append(sv("text", { class: "tick", x: m.l - 5, y: Y(t) + 4, "text-anchor": "end" }, String(+t.toFixed(3))));
    }
    g.append(sv("line", { class: "axis", x1: m.l, x2: W - m.r, y1: H - m.b, y2: H - m.b }));
    g.append(sv("line", { class: "axis", x1: m.l, x2: m.l, y1: m.t, y2: H - m.b }));
    g.append(sv("text", { class: "tick", x: W - m.r, y: H - 4, "text-anchor": "end" }, "angle from snug, °"));
    g.append(sv("text", { class: "tick", x: m.l + 4, y: m.t + 10 }, "torque, N·m"));
    if (L) {
      const tw = L.torque_window || [0, tmax];
      const aw = L.angle_window || [0, amax];
      if (L.torque_window || L.angle_window) {
        g.append(sv("rect", { class: "win", x: X(aw[0]), y: Y(Math.min(tw[1], tmax)), width: Math.max(1, X(Math.min(aw[1], amax)) - X(aw[0])), height: Math.max(1, Y(tw[0]) - Y(Math.min(tw[1], tmax))), "data-ref": "window" }));
        g.append(sv("text", { class: "ref-label", x: X(aw[0]) + 4, y: Y(Math.min(tw[1], tmax)) - 4 }, "window"));
      }
      g.append(sv("line", { class: "snug", x1: m.l, x2: W - m.r, y1: Y(L.snug_nm), y2: Y(L.snug_nm), "data-ref": "snug" }));
      g.append(sv("text", { class: "ref-label", x: W - m.r - 2, y: Y(L.snug_nm) - 3, "text-anchor": "end" }, `snug ${L.snug_nm}`));
      for (const t of L.targets_nm) {
        g.append(sv("line", { class: "target", x1: m.l, x2: W - m.r, y1: Y(t), y2: Y(t), "data-ref": "target" }));
        g.append(sv("text", { class: "ref-label", x: m.l + 4, y: Y(t) - 3 }, `target ${t} N·m`));
      }
      for (const a of L.targets_deg) {
        g.append(sv("line", { class: "target", x1: X(a), x2: X(a), y1: m.t, y2: H - m.b, "data-ref": "target" }));
        g.append(sv("text", { class: "ref-label", x: X(a) + 3, y: m.t + 24 }, `target ${a}°`));
      }
      if (L.max_torque_nm !== null && L.max_torque_nm <= tmax) {
        g.append(sv("line", { class: "limit", x1: m.l, x2: W - m.r, y1: Y(L.max_torque_nm), y2: Y(L.max_torque_nm), "data-ref": "limit" }));
      }
    }
    const d = pts.map((p, i) => `${i ? "L" : "M"}${X(p[0] === null ? 0 : p[0]).toFixed(1)} ${Y(p[1]).toFixed(1)}`).join("");
    const trace = sv("path", { id: "trace", class: "trace", d: d || "M0 0" });
    if (r) {
      trace.dataset.phase = r.phase;
      trace.dataset.status = r.status || "";
    }
    g.append(trace);
    for (const mk of r ? r.marks : []) {
      const x = X(mk.angle_deg === null ? 0 : mk.angle_deg), y = Y(mk.torque_nm);
      let shape;
      if (mk.kind === "stop") shape = sv("path", { class: "mark", d: `M${x} ${y - 7}L${x + 7} ${y}L${x} ${y + 7}L${x - 7} ${y}Z` });
      else if (mk.kind === "yield") shape = sv("path", { class: "mark", d: `M${x} ${y - 7}L${x + 7} ${y + 6}L${x - 7} ${y + 6}Z` });
      else if (mk.kind.startsWith("cue")) shape = sv("line", { class: "mark", x1: x, x2: x, y1: y - 9, y2: y + 9 });
      else shape = sv("circle", { class: "mark", cx: x, cy: y, r: 5 });
      shape.dataset.mark = mk.kind;
      g.append(shape);
      if (mk.kind === "stop" || mk.kind === "yield" || mk.kind === "snug") {
        g.append(sv("text", { class: "mark-label", x: x + 9, y: y + 4 }, words(mk.kind)));
      }
    }
    svg.append(g);
    svg.dataset.points = String(pts.length);
    svg.dataset.rundown = r ? r.id : "";
  }

  // -- the stream --------------------------------------------------------------------------
  function setStream(s, text) {
    const chip = $("stream");
    chip.dataset.state = s;
    document.body.dataset.stream = s;
    chip.querySelector(".text").textContent = text;
  }

  async function resync() {
    stats.resyncs += 1;
    try {
      const res = await fetch("/snapshot.json", { cache: "no-store" });
      take(await res.json());
    } catch (e) {
      stats.errors += 1;
    }
  }

  function take(snapshot) {
    state = snapshot;
    lastSeq = snapshot.seq;
    stats.snapshots += 1;
    curveDirty = true;
    render();
  }

  function onDelta(ev) {
    const msg = JSON.parse(ev.data);
    if (!state || msg.seq <= lastSeq) return;
    if (msg.seq !== lastSeq + 1 || !apply(msg)) {
      resync();
      return;
    }
    lastSeq = msg.seq;
    render();
    stats.applied += 1;
    const lat = performance.timeOrigin + performance.now() - msg.ts_ms;
    stats.latencies.push(lat);
    if (stats.latencies.length > LATENCY_KEEP) stats.latencies.shift();
    const mine = (stats.byType[msg.type] = stats.byType[msg.type] || []);
    mine.push(lat);
    if (mine.length > LATENCY_KEEP) mine.shift();
  }

  function connect() {
    const es = new EventSource("/events");
    es.addEventListener("snapshot", (ev) => take(JSON.parse(ev.data)));
    es.addEventListener("delta", onDelta);
    es.onopen = () => setStream("up", "live");
    es.onerror = () => setStream("down", "reconnecting");
  }

  window.addEventListener("resize", () => { if (state) { curveDirty = true; render(); } });
  document.addEventListener("DOMContentLoaded", connect);
})();
