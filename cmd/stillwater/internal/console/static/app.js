// stillwater page. Polls the daemon's state once a second, draws each
// camera's overlay over its latest frame, sends arm, disarm and clear to
// the control API with the control key, and edits a calibration on a
// frozen frame. Frame pixels: origin top-left, x right, y down.
"use strict";
(function () {
  const body = document.body;
  const API = body.dataset.api;
  const CONTROL = body.dataset.control;
  const KEY_ITEM = "stillwater.control-key";
  const SVG = "http://www.w3.org/2000/svg";
  const POLL_MS = 1000;

  // The control key lives in this tab's sessionStorage and in memory.
  let key = sessionStorage.getItem(KEY_ITEM) || "";

  function el(tag, attrs, ...kids) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v === undefined || v === null || v === false) continue;
      if (k === "text") e.textContent = v;
      else if (k.startsWith("on")) e.addEventListener(k.slice(2), v);
      else e.setAttribute(k, v === true ? "" : v);
    }
    for (const k of kids) if (k !== null && k !== undefined) e.append(k);
    return e;
  }
  function svgEl(tag, attrs) {
    const e = document.createElementNS(SVG, tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (k === "text") e.textContent = v;
      else e.setAttribute(k, v);
    }
    return e;
  }
  // Icons drawn for this page, 16 × 16: each part is a path and how it
  // is painted (f fill, s stroke, w white fill). They repeat what the
  // words say; the words carry the meaning.
  const ICONS = {
    shield: [["M8 1l6 2.2v4.6c0 3.6-2.6 6.2-6 7.2-3.4-1-6-3.6-6-7.2V3.2z", "f"]],
    pause: [["M3.5 2h3.2v12H3.5zM9.3 2h3.2v12H9.3z", "f"]],
    alarm: [["M8 1l7.5 13.5H.5z", "f"], ["M7.1 5h1.8v5H7.1zM7.1 11.2h1.8v1.8H7.1z", "w"]],
    warn: [["M8 1.8l6.6 12H1.4z", "s"], ["M7.2 5.5h1.6v4.5H7.2zM7.2 11h1.6v1.6H7.2z", "f"]],
    check: [["M2 8.5l4 4 8-9", "s"]],
    cross: [["M3 3l10 10M13 3L3 13", "s"]],
    wait: [["M4 1.5h8v3l-3 3.5 3 3.5v3H4v-3l3-3.5-3-3.5z", "s"]],
    eye: [["M1 8s2.6-5 7-5 7 5 7 5-2.6 5-7 5-7-5-7-5z", "s"], ["M8 5.8a2.2 2.2 0 1 1 0 4.4 2.2 2.2 0 1 1 0-4.4z", "f"]],
    key: [["M5 6.5a3 3 0 1 1 0 6 3 3 0 1 1 0-6zM7.2 7.3L13.5 1M11 3.5l2 2", "s"]],
    dot: [["M8 4a4 4 0 1 1 0 8 4 4 0 1 1 0-8z", "f"]],
    back: [["M12.6 9.5A5 5 0 1 1 11 4.2", "s"], ["M9 1.5l3.8 1.6-1.4 3.9", "s"]],
    play: [["M4 2l10 6-10 6z", "f"]],
  };
  function icon(name) {
    const svg = document.createElementNS(SVG, "svg");
    svg.setAttribute("viewBox", "0 0 16 16");
    svg.setAttribute("class", "ic");
    svg.setAttribute("aria-hidden", "true");
    svg.setAttribute("focusable", "false");
    for (const [d, how] of ICONS[name] || ICONS.dot) {
      const p = document.createElementNS(SVG, "path");
      p.setAttribute("d", d);
      if (how === "s") { p.setAttribute("fill", "none"); p.setAttribute("stroke", "currentColor"); p.setAttribute("stroke-width", "2"); p.setAttribute("stroke-linecap", "round"); p.setAttribute("stroke-linejoin", "round"); }
      else p.setAttribute("fill", how === "w" ? "#fff" : "currentColor");
      svg.append(p);
    }
    return svg;
  }
  const pts = (list) => list.map((p) => p[0] + "," + p[1]).join(" ");
  const fix = (v, n) => Number(v).toFixed(n);

  function authHeaders(extra) {
    const h = Object.assign({}, extra || {});
    if (key) h.Authorization = "Bearer " + key;
    return h;
  }

  async function getJSON(url) {
    const r = await fetch(url, { headers: authHeaders(), cache: "no-store" });
    const j = await r.json().catch(() => ({ error: "reply is not JSON (HTTP " + r.status + ")" }));
    if (!r.ok) throw Object.assign(new Error(j.error || "HTTP " + r.status), { reply: j, status: r.status });
    return j;
  }

  // Local time in words, with the zone, e.g. "Wed 2 Dec, 18:00 CET".
  function localTime(iso) {
    const d = new Date(iso);
    return d.toLocaleString(undefined, { weekday: "short", day: "numeric", month: "short", hour: "2-digit", minute: "2-digit", timeZoneName: "short" });
  }

  // ---- control key ----
  const keyInput = document.getElementById("key-input");
  const keyState = document.getElementById("key-state");
  function showKeyState() {
    const words = keyState.querySelector(".words");
    const ic = keyState.querySelector(".icon");
    if (key) {
      keyState.dataset.mode = "control";
      ic.replaceChildren(icon("key"));
      words.textContent = "Control key entered for this tab. The daemon checks it on every request.";
    } else {
      keyState.dataset.mode = "read-only";
      ic.replaceChildren(icon("eye"));
      words.textContent = "Read-only. Enter the control key to arm, disarm or save a calibration.";
    }
    for (const b of document.querySelectorAll("[data-needs-key]")) b.disabled = !key;
    for (const d of document.querySelectorAll("[data-shown-without-key]")) d.hidden = !!key;
  }
  function useKey(k) {
    key = k.trim();
    if (key) sessionStorage.setItem(KEY_ITEM, key);
    else sessionStorage.removeItem(KEY_ITEM);
    showKeyState();
  }
  document.getElementById("key-form").addEventListener("submit", (ev) => {
    ev.preventDefault();
    useKey(keyInput.value);
    keyInput.value = "";
  });
  document.getElementById("key-forget").addEventListener("click", () => useKey(""));
  // The page behind the calibration dialog is inert: it has a key field too.
  const calibKeyInput = document.getElementById("calib-key-input");
  document.getElementById("calib-key-use").addEventListener("click", () => {
    useKey(calibKeyInput.value);
    calibKeyInput.value = "";
  });
  calibKeyInput.addEventListener("keydown", (ev) => {
    if (ev.key === "Enter") {
      ev.preventDefault();
      useKey(calibKeyInput.value);
      calibKeyInput.value = "";
    }
  });

  // ---- cameras ----
  const cams = new Map(); // id -> view
  const camsBox = document.getElementById("cameras");

  const HEALTH = {
    watching: { icon: "check", words: "Watching", tone: "ok" },
    starting: { icon: "wait", words: "Starting, no picture yet", tone: "warn" },
    faulty: { icon: "warn", words: "Fault", tone: "warn" },
    lost: { icon: "cross", words: "No picture", tone: "bad" },
  };

  function badge(name, words, tone) {
    return el("span", { class: "badge", "data-tone": tone }, icon(name), " " + words);
  }

  function makeCamera(id) {
    const sid = "cam-" + id.replace(/[^A-Za-z0-9_-]/g, "_");
    const img = el("img", { alt: "Latest frame from camera " + id, "data-seq": "" });
    const svg = svgEl("svg", { class: "overlay", role: "img", "aria-label": "Water outline, zones and tracks on camera " + id });
    const facts = el("dl", { class: "facts" });
    const tracks = el("ul", { class: "tracks", "aria-label": "Live tracks on camera " + id });
    const reply = el("p", { class: "reply", role: "status", "aria-live": "polite" });
    const untilIn = el("input", { type: "time", id: sid + "-until", required: true });
    const v = {
      id, img, svg, facts, tracks, reply, untilIn, busy: false, seq: "", url: "",
      box: el("section", { class: "camera", id: sid, "aria-labelledby": sid + "-h", "data-camera": id }),
    };
    const act = (action) => () => control(v, action);
    const controls = el("div", { class: "controls", role: "group", "aria-label": "Arming of camera " + id },
      el("button", { type: "button", "data-act": "arm", "data-needs-key": true, onclick: act("arm"), "aria-label": "Arm camera " + id + " now" }, icon("shield"), " Arm now"),
      el("div", { class: "until" }, el("label", { for: sid + "-until", text: "Disarm until (local time)" }), untilIn),
      el("button", { type: "button", "data-act": "disarm", "data-needs-key": true, onclick: act("disarm"), "aria-label": "Disarm camera " + id + " until the time given" }, icon("pause"), " Disarm until"),
      el("button", { type: "button", "data-act": "clear", "data-needs-key": true, onclick: act("clear"), "aria-label": "Camera " + id + " back to its schedule" }, icon("back"), " Back to schedule"),
      reply);
    const calibBtn = el("button", { type: "button", class: "calibrate", onclick: () => openCalibration(v), "aria-label": "Calibrate camera " + id }, "Calibrate\u2026");
    v.box.append(el("h2", { id: sid + "-h", text: "Camera " + id }), el("div", { class: "view" }, img, svg), facts, tracks, controls, calibBtn);
    const d = new Date(Date.now() + 3600e3);
    untilIn.value = String(d.getHours()).padStart(2, "0") + ":00";
    camsBox.append(v.box);
    return v;
  }

  function renderCamera(v, c) {
    const h = HEALTH[c.health] || { icon: "dot", words: c.health, tone: "plain" };
    const armed = c.armed ? badge("shield", "ARMED", "ok") : badge("pause", "DISARMED", "warn");
    const f = [];
    const row = (dt, ...dd) => f.push(el("dt", { text: dt }), el("dd", {}, ...dd));
    row("Camera", badge(h.icon, h.words, h.tone));
    if (c.faults.length) {
      row("Faults", el("ul", { class: "faults" }, ...c.faults.map((x) => el("li", { text: x.detail + " (since " + localTime(x.since) + ")" }))));
    }
    row("Frame rate", fix(c.fps, 1) + " frames a second");
    row("Frame age", c.frame_age_s < 0 ? "no frame yet" : fix(c.frame_age_s, 1) + " s");
    row("Pool", armed, " " + c.armed_why);
    if (c.next_change) {
      const what = c.override ? "Override ends, the schedule decides again" : (c.armed ? "Disarms" : "Arms");
      row("Next change", what + " at " + localTime(c.next_change));
    } else {
      row("Next change", c.override ? "none: armed until someone clears it" : "none scheduled");
    }
    v.facts.replaceChildren(...f);
    v.box.dataset.armed = String(c.armed);
    v.box.dataset.health = c.health;

    const ov = c.overlay;
    const alarm = !!(ov && ov.tracks.some((t) => t.alarm));
    v.box.dataset.alarm = String(alarm);
    const items = [];
    if (ov) {
      const [w, hgt] = ov.frame_px;
      if (w > 0) v.svg.setAttribute("viewBox", "0 0 " + w + " " + hgt);
      const g = [];
      if (ov.outline && ov.outline.length) {
        g.push(svgEl("polygon", { class: "shadow", points: pts(ov.outline) }), svgEl("polygon", { class: "outline", points: pts(ov.outline) }));
      }
      for (const z of ov.zones || []) {
        g.push(svgEl("polygon", { class: "zone", points: pts(z.pixels) }));
        if (z.pixels.length) g.push(svgEl("text", { x: z.pixels[0][0] + 4, y: z.pixels[0][1] - 4, text: "zone " + z.name }));
      }
      for (const t of ov.tracks) {
        const [x, y, bw, bh] = t.box;
        const label = "Track " + t.id + ": " + fix(t.x_m, 2) + " m, " + fix(t.y_m, 2) + " m" + (t.alarm ? " ALARM" : "");
        g.push(svgEl("rect", { class: "track" + (t.alarm ? " alarm" : ""), x, y, width: bw, height: bh }));
        g.push(svgEl("circle", { class: "track" + (t.alarm ? " alarm" : ""), cx: t.at[0], cy: t.at[1], r: 4 }));
        g.push(svgEl("text", { x: x, y: Math.max(14, y - 6), class: "track-label", text: label }));
        items.push(el("li", { "data-track": t.id }, t.alarm ? badge("alarm", "ALARM", "bad") : badge("dot", "tracking", "plain"), " " + label.replace(" ALARM", "")));
      }
      v.svg.replaceChildren(...g);
    } else if (c.overlay_error) {
      items.push(el("li", { text: "Overlay unavailable: " + c.overlay_error }));
    }
    if (!items.length) items.push(el("li", { class: "empty", text: "No one tracked in the water." }));
    if (ov && ov.ignored > 0) items.push(el("li", { class: "ignored", text: ov.ignored + (ov.ignored === 1 ? " small change" : " small changes") + " on the water ignored (ripples, glints, floating things)." }));
    v.tracks.replaceChildren(...items);
  }

  async function refreshFrame(v) {
    if (v.busy) return;
    v.busy = true;
    try {
      const r = await fetch(API + "cameras/" + encodeURIComponent(v.id) + "/frame.jpg", { headers: authHeaders(), cache: "no-store" });
      if (!r.ok) {
        const j = await r.json().catch(() => ({}));
        v.img.alt = "No frame from camera " + v.id + ": " + (j.error || "HTTP " + r.status);
        return;
      }
      const seq = r.headers.get("X-Frame-Seq") || "";
      const blob = await r.blob();
      const url = URL.createObjectURL(blob);
      await new Promise((ok) => { v.img.onload = ok; v.img.onerror = ok; v.img.src = url; });
      if (v.url) URL.revokeObjectURL(v.url);
      v.url = url;
      v.img.alt = "Latest frame from camera " + v.id;
      v.img.dataset.seq = seq;
      v.img.dataset.loads = String(Number(v.img.dataset.loads || 0) + 1);
    } catch (e) {
      v.img.alt = "No frame from camera " + v.id + ": " + e.message;
    } finally {
      v.busy = false;
    }
  }

  // ---- control ----
  function untilISO(hhmm) {
    const [h, m] = hhmm.split(":").map(Number);
    const d = new Date();
    d.setHours(h, m, 0, 0);
    if (d <= new Date()) d.setDate(d.getDate() + 1);
    return d.toISOString();
  }

  async function control(v, action) {
    const body = { camera: v.id, by: "page" };
    if (action === "disarm") {
      if (!v.untilIn.value) {
        say(v.reply, "bad", "\u2716 Give the time the disarm ends.");
        v.untilIn.focus();
        return;
      }
      body.until = untilISO(v.untilIn.value);
    }
    say(v.reply, "plain", "Sending\u2026");
    try {
      const r = await fetch(CONTROL + action, { method: "POST", headers: authHeaders({ "Content-Type": "application/json" }), body: JSON.stringify(body) });
      const j = await r.json().catch(() => ({}));
      if (!r.ok || !j.ok) {
        say(v.reply, "bad", "\u2716 Not done: " + (j.error || "HTTP " + r.status));
        return;
      }
      const words = { arm: "Armed until someone clears it.", disarm: "Disarmed until " + localTime(body.until) + ".", clear: "Back to the schedule." };
      say(v.reply, "ok", "\u2714 Done. " + words[action]);
      poll();
    } catch (e) {
      say(v.reply, "bad", "\u2716 Not sent: " + e.message);
    }
  }

  function say(p, tone, text) {
    p.dataset.tone = tone;
    p.textContent = text;
  }

  // ---- events ----
  const eventList = document.getElementById("event-list");
  const eventsEmpty = document.getElementById("events-empty");
  const snaps = new Map(); // snapshot URL -> object URL

  const KIND = {
    alarm: { icon: "alarm", words: "Alarm" },
    alarm_cleared: { icon: "check", words: "Alarm ended" },
    fault: { icon: "warn", words: "Fault" },
    fault_cleared: { icon: "check", words: "Fault cleared" },
  };

  async function loadSnap(img, url) {
    if (snaps.has(url)) { img.src = snaps.get(url); return; }
    try {
      const r = await fetch(url, { headers: authHeaders() });
      if (!r.ok) { img.alt += " (not available: HTTP " + r.status + ")"; return; }
      const u = URL.createObjectURL(await r.blob());
      snaps.set(url, u);
      img.src = u;
    } catch (e) {
      img.alt += " (not available)";
    }
  }

  let shownEvents = "";
  function renderEvents(events) {
    const sig = events.map((e) => e.id).join("|");
    if (sig === shownEvents) return;
    shownEvents = sig;
    eventsEmpty.hidden = events.length > 0;
    eventList.replaceChildren(...events.map((e) => {
      const k = KIND[e.kind] || { icon: "dot", words: e.kind };
      const li = el("li", { class: "event", "data-kind": e.kind, "data-id": e.id });
      li.append(el("h3", {}, icon(k.icon), " " + k.words + " \u2014 camera " + e.camera));
      li.append(el("p", { class: "when" }, el("time", { datetime: e.time, text: localTime(e.time) })));
      li.append(el("p", { text: e.text }));
      if (e.position_m) li.append(el("p", { text: "Position: " + fix(e.position_m[0], 2) + " m along, " + fix(e.position_m[1], 2) + " m across (track " + e.track + ")" }));
      if (e.why && e.why.length) {
        li.append(el("p", { class: "why-h", text: "Why it was raised:" }));
        const dl = el("dl", { class: "why" });
        for (const f of e.why) dl.append(el("dt", { text: f.name }), el("dd", { text: f.value }));
        li.append(dl);
      }
      if (e.snapshot_url) {
        const img = el("img", { class: "snap", alt: "Snapshot of the " + k.words.toLowerCase() + " on camera " + e.camera + " at " + localTime(e.time), width: "384" });
        loadSnap(img, e.snapshot_url);
        li.append(el("a", { href: e.snapshot_url, target: "_blank", rel: "noopener", "aria-label": "Open the snapshot full size" }, img));
      }
      if (e.clip_url) li.append(el("p", {}, el("a", { href: e.clip_url, download: true }, icon("play"), " Download the clip")));
      return li;
    }));
  }

  // ---- polling ----
  const conn = document.getElementById("conn");
  let polling = false;
  async function poll() {
    if (polling) return;
    polling = true;
    try {
      const st = await getJSON(API + "state");
      conn.dataset.state = "up";
      conn.textContent = "\u2714 Connected. Updated " + new Date(st.now).toLocaleTimeString() + ".";
      for (const c of st.cameras) {
        let v = cams.get(c.id);
        if (!v) { v = makeCamera(c.id); cams.set(c.id, v); showKeyState(); }
        renderCamera(v, c);
        refreshFrame(v);
      }
      renderEvents(st.events);
      const alarming = st.cameras.some((c) => c.overlay && c.overlay.tracks.some((t) => t.alarm));
      document.title = (alarming ? "ALARM \u2014 " : "") + "stillwater \u00B7 pool watch";
    } catch (e) {
      conn.dataset.state = "down";
      conn.textContent = "\u2716 Cannot reach the daemon: " + e.message;
    } finally {
      polling = false;
    }
  }

  // ---- calibration ----
  const dlg = document.getElementById("calib");
  const cImg = document.getElementById("calib-img");
  const cSvg = document.getElementById("calib-svg");
  const cornerList = document.getElementById("corner-list");
  const outlineList = document.getElementById("outline-list");
  const cStatus = document.getElementById("calib-status");
  const cScale = document.getElementById("calib-scale");
  const cRect = document.getElementById("calib-rect");
  const saveBtn = document.getElementById("calib-save");
  const saveReply = document.getElementById("calib-save-reply");
  const inLength = document.getElementById("c-length");
  const inWidth = document.getElementById("c-width");
  const inDepth = document.getElementById("c-depth");
  const inOrigin = document.getElementById("c-origin");
  saveBtn.setAttribute("data-needs-key", "");
  const cal = { url: "", cam: null, frame: [0, 0], corners: [], outline: [], preview: null, error: null, timer: 0, seq: 0 };

  async function openCalibration(v) {
    cal.cam = v.id;
    document.getElementById("calib-h").textContent = "Calibrate camera " + v.id;
    say(saveReply, "plain", "");
    cal.preview = null; cal.error = null;
    try {
      const cur = await getJSON(API + "cameras/" + encodeURIComponent(v.id) + "/calibration");
      cal.corners = (cur.corners || []).map((p) => [p[0], p[1]]);
      cal.outline = (cur.outline || []).map((p) => [p[0], p[1]]);
      inLength.value = cur.length_m || "";
      inWidth.value = cur.width_m || "";
      inDepth.value = cur.depth_m || 0;
      inOrigin.value = "0";
    } catch (e) {
      cal.corners = []; cal.outline = [];
      say(cStatus, "bad", "\u2716 Current calibration not read: " + e.message);
    }
    // Freeze: a frame of its own, kept until the editor opens again.
    try {
      const r = await fetch(API + "cameras/" + encodeURIComponent(v.id) + "/frame.jpg", { headers: authHeaders(), cache: "no-store" });
      if (!r.ok) throw new Error("HTTP " + r.status);
      if (cal.url) URL.revokeObjectURL(cal.url);
      cal.url = URL.createObjectURL(await r.blob());
      cImg.src = cal.url;
      cImg.dataset.seq = r.headers.get("X-Frame-Seq") || "";
      await cImg.decode();
    } catch (e) {
      say(cStatus, "bad", "\u2716 No frame to calibrate on: " + e.message);
      return;
    }
    cal.frame = [cImg.naturalWidth, cImg.naturalHeight];
    cSvg.setAttribute("viewBox", "0 0 " + cal.frame[0] + " " + cal.frame[1]);
    dlg.showModal();
    changed();
  }
  document.getElementById("calib-close").addEventListener("click", () => dlg.close());

  function mode() { return document.querySelector("input[name=mode]:checked").value; }

  function toFrame(ev) {
    const m = cSvg.getScreenCTM().inverse();
    const p = new DOMPoint(ev.clientX, ev.clientY).matrixTransform(m);
    // A click is no finer than a pixel; clamp into the frame.
    return [Math.min(cal.frame[0], Math.max(0, Math.round(p.x))), Math.min(cal.frame[1], Math.max(0, Math.round(p.y)))];
  }

  let drag = null; // { list, i }
  cSvg.addEventListener("pointerdown", (ev) => {
    const h = ev.target.closest(".handle");
    if (h) {
      drag = { list: h.dataset.list, i: Number(h.dataset.i) };
      cSvg.setPointerCapture(ev.pointerId);
      ev.preventDefault();
      return;
    }
    const p = toFrame(ev);
    if (mode() === "corners") {
      if (cal.corners.length >= 4) {
        say(cStatus, "bad", "Four corners are placed: drag one to move it, or clear them to start again.");
        return;
      }
      cal.corners.push(p);
    } else {
      cal.outline.push(p);
    }
    changed();
  });
  cSvg.addEventListener("pointermove", (ev) => {
    if (!drag) return;
    cal[drag.list][drag.i] = toFrame(ev);
    drawCalib();
    schedulePreview();
  });
  const endDrag = () => { if (drag) { drag = null; changed(); } };
  cSvg.addEventListener("pointerup", endDrag);
  cSvg.addEventListener("pointercancel", endDrag);

  document.getElementById("corners-reset").addEventListener("click", () => { cal.corners = []; changed(); });
  document.getElementById("outline-undo").addEventListener("click", () => { cal.outline.pop(); changed(); });
  document.getElementById("outline-reset").addEventListener("click", () => { cal.outline = []; changed(); });
  for (const i of [inLength, inWidth, inDepth]) i.addEventListener("input", () => { drawCalib(); schedulePreview(); });
  // The origin renames the corners in the list as well as on the picture.
  inOrigin.addEventListener("change", changed);

  function changed() {
    drawCalib();
    renderPointLists();
    schedulePreview();
  }

  function pointRow(list, i, name) {
    const p = cal[list][i];
    const id = "p-" + list + "-" + i;
    const upd = (j) => (ev) => {
      const n = Number(ev.target.value);
      if (Number.isFinite(n)) { cal[list][i][j] = n; drawCalib(); schedulePreview(); }
    };
    return el("li", { "data-list": list, "data-i": i },
      el("div", { class: "xy" },
        el("span", { text: name }),
        el("label", { for: id + "-x", text: "x" }), el("input", { id: id + "-x", type: "number", step: "1", value: p[0], "aria-label": name + " x in pixels", oninput: upd(0) }),
        el("label", { for: id + "-y", text: "y" }), el("input", { id: id + "-y", type: "number", step: "1", value: p[1], "aria-label": name + " y in pixels", oninput: upd(1) })),
      el("p", { class: "field-error", id: "err-" + list + "-" + i, role: "alert" }));
  }

  function cornerName(i) {
    const o = Number(inOrigin.value);
    return "Point " + (i + 1) + (cal.corners.length === 4 ? " (corner " + "ABCD"[(i - o + 4) % 4] + ")" : "");
  }

  function renderPointLists() {
    cornerList.replaceChildren(...cal.corners.map((_, i) => pointRow("corners", i, cornerName(i))));
    outlineList.replaceChildren(...cal.outline.map((_, i) => pointRow("outline", i, "Edge " + (i + 1))));
    showErrors();
  }

  function drawCalib() {
    const g = [];
    const p = cal.preview;
    if (p) {
      for (const line of p.grid) g.push(svgEl("polyline", { class: "grid-shadow", points: pts(line) }));
      for (const line of p.grid) g.push(svgEl("polyline", { class: "grid", points: pts(line) }));
      g.push(svgEl("polyline", { class: "axis-x", points: pts(p.axis_x) }), svgEl("polyline", { class: "axis-y", points: pts(p.axis_y) }));
    }
    if (cal.outline.length >= 2) g.push(svgEl("polygon", { class: "edge", points: pts(cal.outline) }));
    const bad = cal.error || {};
    cal.outline.forEach((q, i) => {
      const isBad = bad.field === "outline" && bad.point === i;
      g.push(svgEl("circle", { class: "handle edgept" + (isBad ? " bad" : ""), cx: q[0], cy: q[1], r: 6, "data-list": "outline", "data-i": i }));
    });
    cal.corners.forEach((q, i) => {
      const isBad = bad.field === "corners" && bad.point === i;
      g.push(svgEl("circle", { class: "handle" + (isBad ? " bad" : ""), cx: q[0], cy: q[1], r: 9, "data-list": "corners", "data-i": i }));
      g.push(svgEl("text", { x: q[0] + 12, y: q[1] - 10, class: isBad ? "bad" : "", text: cornerName(i).replace("Point ", "").replace(" (corner ", " ").replace(")", "") + (isBad ? " \u2716 " + bad.msg : "") }));
    });
    cSvg.replaceChildren(...g);
  }

  function showErrors() {
    for (const p of dlg.querySelectorAll(".field-error")) p.textContent = "";
    const e = cal.error;
    if (!e) return;
    let target = null;
    if ((e.field === "corners" || e.field === "outline") && e.point >= 0) target = document.getElementById("err-" + e.field + "-" + e.point);
    else if (e.field) target = document.getElementById("err-" + e.field);
    if (target) target.textContent = "\u2716 " + e.msg;
  }

  function input() {
    return {
      corners: cal.corners,
      origin: Number(inOrigin.value),
      outline: cal.outline.length ? cal.outline : undefined,
      length_m: Number(inLength.value),
      width_m: Number(inWidth.value),
      depth_m: Number(inDepth.value) || 0,
    };
  }

  function schedulePreview() {
    clearTimeout(cal.timer);
    cal.timer = setTimeout(preview, 150);
  }

  async function preview() {
    if (cal.corners.length < 4) {
      cal.preview = null; cal.error = null;
      say(cStatus, "plain", "Place corner " + (cal.corners.length + 1) + " of 4.");
      cScale.replaceChildren();
      cRect.hidden = true;
      drawCalib(); showErrors();
      return;
    }
    if (!(Number(inLength.value) > 0 && Number(inWidth.value) > 0)) {
      cal.preview = null; cal.error = null;
      say(cStatus, "plain", "Give the pool's length and width in metres.");
      drawCalib(); showErrors();
      return;
    }
    const seq = ++cal.seq;
    const sent = input();
    try {
      const r = await fetch(API + "cameras/" + encodeURIComponent(cal.cam) + "/calibration/preview", { method: "POST", headers: authHeaders({ "Content-Type": "application/json" }), body: JSON.stringify(sent) });
      const j = await r.json().catch(() => ({ error: "reply is not JSON (HTTP " + r.status + ")" }));
      if (seq !== cal.seq) return; // a newer preview is on its way
      if (!r.ok) {
        cal.preview = null;
        cal.error = { field: j.field || "", point: j.point === undefined ? -1 : j.point, msg: j.error };
        delete cStatus.dataset.solved;
        say(cStatus, "bad", "\u2716 " + j.error);
        cScale.replaceChildren();
        cRect.hidden = true;
      } else {
        cal.preview = j; cal.error = null;
        cStatus.dataset.solved = JSON.stringify(sent.corners) + " " + sent.origin + " " + sent.length_m + " " + sent.width_m;
        say(cStatus, "ok", "\u2714 Solved. Check that the 1 m grid lies flat on the water and the top-down view is square.");
        const f = [];
        const row = (dt, dd) => f.push(el("dt", { text: dt }), el("dd", { text: dd }));
        row("Near end", fix(j.near_m_per_px * 100, 2) + " cm per pixel (corner " + j.near_corner + ")");
        row("Far end", fix(j.far_m_per_px * 100, 2) + " cm per pixel (corner " + j.far_corner + ")");
        for (const n of j.notes || []) row("Note", n);
        cScale.replaceChildren(...f);
        if (j.rectified_jpeg) { cRect.src = "data:image/jpeg;base64," + j.rectified_jpeg; cRect.hidden = false; }
      }
    } catch (e) {
      say(cStatus, "bad", "\u2716 Preview failed: " + e.message);
    }
    drawCalib(); showErrors();
  }

  saveBtn.addEventListener("click", async () => {
    say(saveReply, "plain", "Saving\u2026");
    try {
      const r = await fetch(API + "cameras/" + encodeURIComponent(cal.cam) + "/calibration", { method: "PUT", headers: authHeaders({ "Content-Type": "application/json" }), body: JSON.stringify(input()) });
      const j = await r.json().catch(() => ({}));
      if (!r.ok) {
        if (j.field !== undefined || j.point !== undefined) {
          cal.error = { field: j.field || "", point: j.point === undefined ? -1 : j.point, msg: j.error };
          drawCalib(); showErrors();
        }
        say(saveReply, "bad", "\u2716 Not saved: " + (j.error || "HTTP " + r.status));
        return;
      }
      say(saveReply, "ok", "\u2714 Saved. The daemon is reloading it; the camera uses it from its next frame.");
    } catch (e) {
      say(saveReply, "bad", "\u2716 Not sent: " + e.message);
    }
  });

  showKeyState();
  poll();
  setInterval(poll, POLL_MS);
})();
