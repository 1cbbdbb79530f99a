// sparsewatch page: start sessions, watch one live over a websocket, change
// its settings (owner only). Vanilla JS and canvas; the protocol is in
// DEVELOPERS.md ("Websocket protocol"). Tests poll document.body.dataset.
"use strict";
(() => {
  const $ = (id) => document.getElementById(id);
  const body = document.body;

  const POLICIES = [
    ["adaptive", "adaptive (read where the statistic is high)"],
    ["thompson", "randomised by statistic (Thompson)"],
    ["spatial", "adaptive with neighbours"],
    ["random", "random pixels"],
    ["stride", "in turn, a slice per frame"],
    ["full", "every pixel (no budget)"],
  ];
  // Status states (server) -> words shown to people.
  const STATE_WORDS = {
    queued: "waiting to start", learning: "learning reference", calibrating: "setting the limit",
    watching: "watching", alarm: "alarm", finished: "finished", failed: "failed",
    stopped: "stopped", connecting: "connecting", offline: "connection lost",
  };
  const WIRE_STATES = ["learning", "watching", "alarm", "finished"];
  const COLORS = {
    mask: [25, 195, 255], region: "#ff4d2e", picked: "#ffd23f", g: "#1d3557",
    limit: "#c63a22", episode: "rgba(255, 77, 46, 0.22)", learn: "rgba(138, 127, 90, 0.20)",
  };
  const STORE_KEY = "sparsewatch.sessions";

  // ---------- small helpers ----------

  function fmt(v, d = 2) {
    if (v === null || v === undefined || Number.isNaN(v)) return "–";
    if (!Number.isFinite(v)) return v > 0 ? "∞" : "−∞";
    const a = Math.abs(v);
    if (a !== 0 && (a >= 1e5 || a < 1e-3)) return v.toExponential(2);
    return v.toFixed(d);
  }
  function intText(n) { return Math.round(n).toLocaleString("en-US"); }
  function showError(msg) {
    const el = $("page-error");
    el.textContent = msg; el.hidden = !msg;
    if (msg) body.dataset.error = msg; else delete body.dataset.error;
  }
  function setProgress(el, frac, label) {
    el.hidden = false;
    el.querySelector(".bar").style.width = Math.round(Math.max(0, Math.min(1, frac)) * 100) + "%";
    el.querySelector(".label").textContent = label;
  }
  function loadStore() {
    try { return JSON.parse(localStorage.getItem(STORE_KEY) || "{}") || {}; } catch { return {}; }
  }
  function remember(id, info) {
    const s = loadStore();
    s[id] = Object.assign(s[id] || {}, info);
    try { localStorage.setItem(STORE_KEY, JSON.stringify(s)); } catch { /* private mode: links still work */ }
  }
  function absURL(u) { return u ? new URL(u, location.origin).href : ""; }
  function errorText(status, data, fallback) {
    if (data && typeof data === "object") {
      const m = data.error || data.message || data.msg;
      if (m) return typeof m === "string" ? m : JSON.stringify(m);
    }
    return fallback || ("request failed (" + status + ")");
  }
  // api sends a JSON request and returns the parsed answer; errors carry the
  // server's message and status.
  async function api(method, path, payload, token) {
    const opt = { method, headers: {} };
    if (token) opt.headers.Authorization = "Bearer " + token;
    if (payload !== undefined) {
      opt.headers["Content-Type"] = "application/json";
      opt.body = JSON.stringify(payload);
    }
    const res = await fetch(path, opt);
    const text = await res.text();
    let data = null;
    try { data = text ? JSON.parse(text) : null; } catch { data = text; }
    if (!res.ok) {
      const e = new Error(errorText(res.status, data, text));
      e.status = res.status;
      throw e;
    }
    return data;
  }
  function fillPolicies(sel) {
    sel.innerHTML = "";
    for (const [v, label] of POLICIES) {
      const o = document.createElement("option");
      o.value = v; o.textContent = label; sel.appendChild(o);
    }
  }

  // ---------- session state ----------

  const S = {
    id: "", token: "", role: "", name: "",
    W: 0, H: 0, gw: 0, gh: 0, tile: 1,
    params: {}, status: {}, limit: 0,
    fr: [], g: [], lim: [], st: [],          // history, ascending frames
    alarms: new Map(),                       // alarm.frame -> alarm
    cur: null,                               // latest frame update
    preview: null, previewFrame: -1,
    heat: null, heatFrame: -1,
    picked: -1,                              // frame picked on chart or list
    shareURL: "",
    ws: null, wsTries: 0, closing: false,
  };

  function setState(st) {
    if (body.dataset.state !== st && $("view")) dirty();
    if (cam.on && (st === "failed" || st === "finished")) stopCamera("The session ended; the camera is off.");
    body.dataset.state = st;
    const b = $("state-badge");
    b.hidden = false;
    b.textContent = STATE_WORDS[st] || st;
    $("f-state").textContent = STATE_WORDS[st] || st;
  }

  function resetHistory() {
    S.fr = []; S.g = []; S.lim = []; S.st = [];
    S.alarms.clear(); S.cur = null; S.picked = -1;
    S.preview = null; S.previewFrame = -1; S.heat = null;
    body.dataset.frame = "-1";
    renderAlarms();
  }

  // ---------- routing ----------

  async function start() {
    fillPolicies(document.querySelector("#new-settings select[name=policy]"));
    fillPolicies(document.querySelector("#settings select[name=policy]"));
    const path = location.pathname;
    let m;
    try {
      if ((m = path.match(/^\/watch\/([^/]+)\/?$/))) {
        const id = decodeURIComponent(m[1]);
        const frag = new URLSearchParams(location.hash.slice(1));
        let tok = frag.get("token") || "";
        if (tok) remember(id, { owner_token: tok, owner_url: path + "#token=" + tok });
        else tok = (loadStore()[id] || {}).owner_token || "";
        if (!tok) throw new Error("This owner link has no token. Open the link you got when the session started.");
        openSession(id, tok, "owner");
      } else if ((m = path.match(/^\/share\/([^/]+)\/?$/))) {
        const share = decodeURIComponent(m[1]);
        const info = await api("GET", "/api/share/" + encodeURIComponent(share));
        openSession(info.id, share, info.role || "viewer");
      } else {
        openHome();
      }
    } catch (e) {
      setState("failed");
      showError(e.message);
    }
  }

  // ---------- home: upload, demo, list ----------

  let picked = [];   // files chosen for upload

  function openHome() {
    $("home").hidden = false;
    body.dataset.role = "";
    body.dataset.state = "home";
    wireUpload();
    wireDemo();
    wireCameraForm();
    listSessions();
  }

  function describePicked() {
    const n = picked.length;
    const bytes = picked.reduce((a, f) => a + f.size, 0);
    $("picked").textContent = n === 0 ? "Nothing chosen yet." :
      n + (n === 1 ? " file, " : " files, ") + (bytes / 1e6).toFixed(bytes < 1e6 ? 2 : 1) + " MB" +
      (n === 1 ? " (" + picked[0].name + ")" : "");
    $("send").disabled = n === 0;
    body.dataset.picked = String(n);
  }
  function keep(files) {
    picked = Array.from(files).filter((f) => !f.name.startsWith("."));
    describePicked();
  }
  // Walks a dropped folder (DataTransferItem entries) into a flat file list.
  async function walkEntry(entry, out) {
    if (entry.isFile) {
      out.push(await new Promise((ok, bad) => entry.file(ok, bad)));
      return;
    }
    if (!entry.isDirectory) return;
    const reader = entry.createReader();
    for (;;) {
      const batch = await new Promise((ok, bad) => reader.readEntries(ok, bad));
      if (batch.length === 0) break;
      for (const e of batch) await walkEntry(e, out);
    }
  }

  function wireUpload() {
    $("files").addEventListener("change", (e) => keep(e.target.files));
    $("folder").addEventListener("change", (e) => keep(e.target.files));
    const drop = $("drop");
    drop.addEventListener("dragover", (e) => { e.preventDefault(); drop.classList.add("over"); });
    drop.addEventListener("dragleave", () => drop.classList.remove("over"));
    drop.addEventListener("drop", async (e) => {
      e.preventDefault();
      drop.classList.remove("over");
      const items = Array.from(e.dataTransfer.items || []);
      const entries = items.map((it) => it.webkitGetAsEntry && it.webkitGetAsEntry()).filter(Boolean);
      if (entries.length === 0) { keep(e.dataTransfer.files); return; }
      const out = [];
      try { for (const en of entries) await walkEntry(en, out); } catch (err) { showError("Could not read the dropped folder: " + err.message); }
      keep(out);
    });
    $("send").addEventListener("click", upload);
  }

  function newParams() {
    const f = $("new-settings");
    const p = {};
    const budget = f.querySelector("[name=budget]").value.trim();
    if (budget) p.budget = budget;
    p.policy = f.querySelector("[name=policy]").value;
    const rf = parseInt(f.querySelector("[name=reference_frames]").value, 10);
    if (rf > 0) p.reference_frames = rf;
    const tile = parseInt(f.querySelector("[name=tile]").value, 10);
    if (tile > 0) p.tile = tile;
    const a = parseFloat(f.querySelector("[name=arl0]").value);
    if (a > 0) p.arl0 = a;
    const pace = parseFloat(f.querySelector("[name=pace]").value);
    if (pace >= 0) p.pace = pace;
    const limit = parseFloat(f.querySelector("[name=limit]").value);
    if (limit > 0) p.limit = limit;
    return p;
  }

  // uploadName is the folder's name when a folder was chosen, else the file's.
  function uploadName() {
    const rel = picked[0] && picked[0].webkitRelativePath;
    if (rel && rel.includes("/")) return rel.split("/")[0];
    if (picked.length === 1) return picked[0].name;
    const names = picked.map((f) => f.name).sort((p, q) => p.localeCompare(q, "en", { numeric: true }));
    return names[0] + " … " + names[names.length - 1] + " (" + picked.length + " files)";
  }

  function upload() {
    if (picked.length === 0) return;
    const fd = new FormData();
    // Natural order is the server's job; we keep the folder's names.
    for (const f of picked) fd.append("files", f, f.name);
    fd.append("params", JSON.stringify(newParams()));
    fd.append("name", uploadName());
    const xhr = new XMLHttpRequest();
    const prog = $("upload-progress");
    const total = picked.reduce((a, f) => a + f.size, 0);
    setProgress(prog, 0, "uploading…");
    $("send").disabled = true;
    body.dataset.state = "uploading";
    xhr.upload.onprogress = (e) => {
      const t = e.lengthComputable ? e.total : total;
      setProgress(prog, t ? e.loaded / t : 0, "uploading " + (e.loaded / 1e6).toFixed(1) + " of " + (t / 1e6).toFixed(1) + " MB");
    };
    xhr.onerror = () => { body.dataset.state = "home"; $("send").disabled = false; showError("The upload failed: the server could not be reached."); };
    xhr.onload = () => {
      let data = null;
      try { data = JSON.parse(xhr.responseText); } catch { /* keep null */ }
      if (xhr.status !== 201 && xhr.status !== 200) {
        body.dataset.state = "home";
        $("send").disabled = false;
        setProgress(prog, 0, "not accepted");
        showError("The upload was not accepted: " + errorText(xhr.status, data, xhr.responseText));
        return;
      }
      setProgress(prog, 1, "uploaded, opening the session…");
      goToSession(data, uploadName());
    };
    xhr.open("POST", "/api/sessions");
    xhr.send(fd);
  }

  function goToSession(data, name) {
    remember(data.id, { owner_token: data.owner_token, owner_url: data.owner_url, share_url: data.share_url, name });
    location.href = data.owner_url || ("/watch/" + encodeURIComponent(data.id) + "#token=" + encodeURIComponent(data.owner_token));
  }

  async function wireDemo() {
    const sel = $("demo-scenario");
    try {
      const list = await api("GET", "/api/demos");
      const items = Array.isArray(list) ? list : (list && (list.demos || list.scenarios)) || [];
      for (const d of items) {
        const o = document.createElement("option");
        o.value = typeof d === "string" ? d : d.name;
        o.textContent = typeof d === "string" ? d : (d.title || d.name) +
          (d.width ? " (" + d.width + " × " + d.height + ", " + d.frames + " frames)" : "");
        o.dataset.about = (d && d.about) || "";
        sel.appendChild(o);
      }
      const about = () => { const o = sel.selectedOptions[0]; $("demo-about").textContent = o ? o.dataset.about : ""; };
      sel.addEventListener("change", about);
      about();
    } catch { /* no list: the server picks its default scene */ }
    sel.hidden = sel.options.length === 0;
    $("demo").addEventListener("click", async () => {
      $("demo").disabled = true;
      try {
        const source = { kind: "demo" };
        if (sel.value) source.scenario = sel.value;
        const data = await api("POST", "/api/sessions", { source, params: {} });
        goToSession(data, "demo " + (sel.value || ""));
      } catch (e) {
        $("demo").disabled = false;
        showError("Could not start a demo: " + e.message);
      }
    });
  }

  async function listSessions() {
    const tb = $("sessions").querySelector("tbody");
    let list;
    try { list = await api("GET", "/api/sessions"); } catch (e) {
      tb.innerHTML = "<tr><td colspan=4 class=muted></td></tr>";
      tb.querySelector("td").textContent = "Could not list sessions: " + e.message;
      return;
    }
    const items = Array.isArray(list) ? list : (list && list.sessions) || [];
    const mine = loadStore();
    tb.innerHTML = "";
    if (items.length === 0) tb.innerHTML = "<tr><td colspan=4 class=muted>None yet.</td></tr>";
    for (const s of items) {
      const tr = document.createElement("tr");
      const own = mine[s.id];
      const cells = [s.name || s.id, STATE_WORDS[s.state] || s.state || "", s.frames_total > 0 ? (s.frames_seen || 0) + " / " + s.frames_total : String(s.frames_seen ?? s.frames ?? "")];
      for (const c of cells) { const td = document.createElement("td"); td.textContent = c; tr.appendChild(td); }
      const td = document.createElement("td");
      if (own && own.owner_token) {
        const a = document.createElement("a");
        a.href = own.owner_url || ("/watch/" + encodeURIComponent(s.id) + "#token=" + encodeURIComponent(own.owner_token));
        a.textContent = "open";
        td.appendChild(a);
      } else {
        td.className = "muted"; td.textContent = "link not on this browser";
      }
      tr.appendChild(td);
      tb.appendChild(tr);
    }
  }

  // ---------- watch one session ----------

  function openSession(id, token, role) {
    S.id = id; S.token = token; S.role = role;
    body.dataset.role = role;
    body.dataset.session = id;
    body.classList.toggle("viewer", role !== "owner");
    $("watch").hidden = false;
    $("role-note").textContent = role === "owner" ?
      "You opened the owner link: you can change the settings." :
      "Watch-only link: you see everything live, but cannot change anything.";
    $("settings-fields").disabled = role !== "owner";
    $("settings-who").textContent = role === "owner" ? "" : "(only the owner link can change them)";
    for (const b of ["compare", "share", "calibrate", "apply"]) $(b).disabled = role !== "owner";
    const q = "?token=" + encodeURIComponent(token);
    const base = "/api/sessions/" + encodeURIComponent(id);
    $("dl-csv").href = base + "/alarms.csv" + q;
    $("dl-jsonl").href = base + "/alarms.jsonl" + q;
    $("dl-report").href = base + "/report" + q;
    $("dl-stats").href = base + "/stats.csv" + q;
    $("dl-html").href = base + "/report.html" + q;
    $("dl-html").download = "sparsewatch-" + id + "-report.html";
    $("dl-report").download = "sparsewatch-" + id + "-report.json";
    $("dl-stats").download = "sparsewatch-" + id + "-stats.csv";
    $("dl-csv").download = "sparsewatch-" + id + "-alarms.csv";
    $("dl-jsonl").download = "sparsewatch-" + id + "-alarms.jsonl";
    setState("connecting");
    wireView();
    wireChart();
    wireSettings();
    wireCompare();
    wirePlanner();
    wireShare();
    $("snapshot").addEventListener("click", snapshot);
    window.addEventListener("resize", () => { view.fitted && fitView(); dirty(); });
    connect();
  }

  function connect() {
    const proto = location.protocol === "https:" ? "wss://" : "ws://";
    const url = proto + location.host + "/ws/sessions/" + encodeURIComponent(S.id) + "?token=" + encodeURIComponent(S.token);
    const ws = new WebSocket(url);
    ws.binaryType = "arraybuffer";
    S.ws = ws;
    ws.onopen = () => {
      S.wsTries = 0;
      if ($("show-heat").checked) ws.send(JSON.stringify({ type: "heat", on: true }));
    };
    ws.onmessage = (ev) => {
      try {
        if (typeof ev.data === "string") onText(JSON.parse(ev.data));
        else onBinary(ev.data);
      } catch (e) {
        body.dataset.protocolError = e.message;
        console.error("sparsewatch: bad message", e);
      }
    };
    ws.onclose = () => {
      if (S.ws !== ws || S.closing) return;
      cam.inflight = 0;
      const done = ["finished", "failed", "stopped"].includes(body.dataset.state);
      if (!done) setState("offline");
      S.wsTries++;
      if (S.wsTries <= 20) setTimeout(connect, Math.min(5000, 300 * S.wsTries));
    };
  }

  function send(msg) {
    if (S.ws && S.ws.readyState === WebSocket.OPEN) S.ws.send(JSON.stringify(msg));
  }

  // ---------- messages ----------

  function onText(m) {
    switch (m.type) {
      case "hello": onHello(m); break;
      case "alarm": addAlarm(m.alarm); renderAlarms(); dirtyChart(); break;
      case "status": onStatus(m.session || {}); break;
      case "calibration": onCalibration(m); break;
      case "plan": onPlanMessage(m); break;
      case "camera": onCameraAck(m); break;
      case "error": showError(m.message || m.error || "server error"); break;
      default: break;
    }
  }

  function onHello(m) {
    resetHistory();
    S.role = m.role || S.role;
    setGeometry(m.width, m.height, m.grid_w, m.grid_h, m.tile);
    S.params = m.params || {};
    if (m.share_url) S.shareURL = absURL(m.share_url);
    const h = m.history || {};
    const fr = h.frame || [], g = h.g || [];
    S.limit = h.limit || 0;
    for (let i = 0; i < fr.length; i++) {
      S.fr.push(fr[i]); S.g.push(g[i]);
      S.lim.push(h.limits ? h.limits[i] : S.limit);
      S.st.push(h.state ? h.state[i] : -1);
    }
    for (const a of h.alarms || []) addAlarm(a);
    cam.inflight = 0; // a fresh hello: answers to earlier frames may be lost
    onStatus(m.session || {});
    if (m.session && (m.session.live || LIVE_WORDS[m.session.source])) setupLive(m.session);
    fillSettings(S.params);
    if (S.fr.length) body.dataset.frame = String(S.fr[S.fr.length - 1]);
    body.dataset.hello = String((+body.dataset.hello || 0) + 1);
    fitView();
    renderAlarms();
    dirty(); dirtyChart();
  }

  function setGeometry(w, h, gw, gh, tile) {
    S.W = w | 0; S.H = h | 0; S.tile = tile || 1;
    planDefaults();
    S.gw = gw | 0 || Math.ceil(S.W / S.tile); S.gh = gh | 0 || Math.ceil(S.H / S.tile);
    $("f-size").textContent = S.W ? S.W + " × " + S.H + " pixels" + (S.tile > 1 ? ", tiles of " + S.tile + " × " + S.tile : "") +
      " (" + intText(S.gw * S.gh) + " streams)" : "not known yet";
  }

  function onStatus(s) {
    // A run that starts over (new settings) reports frame -1: drop the old history.
    if (s.frame === -1 && (s.state === "queued" || s.frames_seen === 0) && (S.fr.length > 0 || S.cur)) resetHistory();
    S.status = Object.assign(S.status, s);
    if (s.width && s.height && (s.width !== S.W || s.height !== S.H || s.grid_w !== S.gw)) {
      setGeometry(s.width, s.height, s.grid_w, s.grid_h, s.tile);
      fitView();
    }
    if (s.calibration) onCalibration(s.calibration);
    if (s.state === "failed" && s.message) showError("The review stopped: " + s.message);
    if (s.name) { S.name = s.name; $("session-name").textContent = s.name; document.title = s.name + " – sparsewatch"; }
    if (s.params) { S.params = s.params; }
    if (s.state) setState(s.state);
    if (typeof s.limit === "number" && s.limit > 0) S.limit = s.limit;
    if (Array.isArray(s.alarms)) { for (const a of s.alarms) addAlarm(a); renderAlarms(); }
    const errs = s.errors || [];
    const fe = $("file-errors");
    fe.hidden = errs.length === 0;
    fe.textContent = "";
    if (errs.length) {
      const p = document.createElement("p");
      p.textContent = errs.length + (errs.length === 1 ? " problem" : " problems") + " (the other frames go on):";
      fe.appendChild(p);
      const ul = document.createElement("ul");
      for (const e of errs.slice(0, 20)) {
        const li = document.createElement("li");
        li.textContent = (e.file ? e.file + ": " : "") + (e.message || e.error || JSON.stringify(e));
        ul.appendChild(li);
      }
      fe.appendChild(ul);
    }
    body.dataset.fileErrors = String(errs.length);
    if (s.state === "calibrating" && typeof s.progress === "number") onCalibration({ progress: s.progress });
    // Reference learning progress, before any watched frame.
    const rf = (S.params && S.params.reference_frames) || 0;
    if (s.state === "learning" && rf > 0 && typeof s.frames_seen === "number") {
      const n = Math.min(s.frames_seen, rf);
      setProgress($("cal-progress"), n / rf, "learning the reference: " + n + " of " + rf + " frames");
    } else if (["watching", "alarm"].includes(s.state) && $("cal-progress").querySelector(".label").textContent.startsWith("learning")) {
      $("cal-progress").hidden = true; // learnt; a limit being set shows here instead
    }
    updateFacts();
    dirty();
  }

  function onCalibration(m) {
    const prog = $("cal-progress");
    const p = typeof m.progress === "number" ? m.progress : 0;
    setProgress(prog, p, p >= 1 ? "limit set" : "setting the limit… " + Math.round(p * 100) + "%");
    body.dataset.calibration = String(p);
    S.status.calibration = Object.assign(S.status.calibration || {}, m);
    dirty();
    if (m.limit) {
      S.limit = m.limit;
      let t = "Limit " + fmt(m.limit, 3);
      if (m.arl0) t += ": about " + intText(m.arl0) + (m.arl0_se ? " ± " + intText(m.arl0_se) : "") + " frames between false alarms";
      if (m.extrapolated) t += " (extrapolated)";
      $("cal-result").textContent = t + ".";
      $("cal-note").textContent = m.note || "";
      $("cal-note-box").hidden = !m.note;
      dirtyChart();
    }
  }

  function onBinary(buf) {
    const dv = new DataView(buf);
    if (dv.byteLength < 1) return;
    traffic.bytes += dv.byteLength;
    if (dv.getUint8(0) === 1) traffic.frames++;
    body.dataset.bytesIn = String(traffic.bytes);
    body.dataset.frameUpdates = String(traffic.frames);
    switch (dv.getUint8(0)) {
      case 1: onFrame(decodeFrame(dv)); break;
      case 2: onPreview(dv, buf); break;
      case 3: onHeat(dv); break;
      default: break;
    }
  }

  const traffic = { bytes: 0, frames: 0 }; // binary bytes received, frame updates among them

  // decodeFrame reads a kind-1 frame update (DEVELOPERS.md); it throws on a
  // short or inconsistent message rather than drawing garbage.
  function decodeFrame(dv) {
    if (dv.byteLength < 27) throw new Error("frame update too short");
    const u = {
      state: dv.getUint8(1), scale: dv.getUint16(2, true), frame: dv.getUint32(4, true),
      g: dv.getFloat32(8, true), limit: dv.getFloat32(12, true),
      mw: dv.getUint16(16, true), mh: dv.getUint16(18, true), enc: dv.getUint8(20),
    };
    const mlen = dv.getUint32(21, true);
    let o = 25;
    if (o + mlen + 2 > dv.byteLength) throw new Error("frame update mask overruns the message");
    u.mask = new Uint8Array(dv.buffer, dv.byteOffset + o, mlen);
    o += mlen;
    const n = dv.getUint16(o, true); o += 2;
    if (o + n * 12 > dv.byteLength) throw new Error("frame update regions overrun the message");
    u.regions = [];
    for (let i = 0; i < n; i++, o += 12) {
      u.regions.push({
        x0: dv.getUint16(o, true), y0: dv.getUint16(o + 2, true),
        x1: dv.getUint16(o + 4, true), y1: dv.getUint16(o + 6, true),
        peak: dv.getFloat32(o + 8, true),
      });
    }
    return u;
  }

  function onFrame(u) {
    S.cur = u;
    // History: append new frames, overwrite a frame sent again (after a seek).
    const last = S.fr.length ? S.fr[S.fr.length - 1] : -1;
    if (u.frame > last) {
      S.fr.push(u.frame); S.g.push(u.g); S.lim.push(u.limit); S.st.push(u.state);
    } else {
      const i = findFrame(u.frame);
      if (i >= 0 && S.fr[i] === u.frame) { S.g[i] = u.g; S.lim[i] = u.limit; S.st[i] = u.state; }
    }
    if (u.limit > 0) S.limit = u.limit;
    if (!(u.state === 3 && u.mask.length === 0)) maskLayer(u);
    else if (S.prevMask) { u.mw = S.prevMask.mw; u.mh = S.prevMask.mh; u.scale = S.prevMask.scale; u.readCount = S.prevMask.readCount; }
    S.prevMask = { mw: u.mw, mh: u.mh, scale: u.scale, readCount: u.readCount };
    const st = WIRE_STATES[u.state];
    const shown = body.dataset.state;
    if (st && !(st === "learning" && shown === "calibrating")) setState(st);
    body.dataset.frame = String(u.frame);
    body.dataset.regions = JSON.stringify(u.regions.map((r) => [r.x0, r.y0, r.x1, r.y1]));
    body.dataset.g = String(u.g);
    body.dataset.limit = String(u.limit);
    body.dataset.frames = String((+body.dataset.frames || 0) + 1);
    updateFacts();
    dirty(); dirtyChart();
  }

  function onPreview(dv, buf) {
    if (dv.byteLength < 8) return;
    const format = dv.getUint8(1), frame = dv.getUint32(4, true);
    const blob = new Blob([new Uint8Array(buf, 8)], { type: format === 1 ? "image/jpeg" : "image/png" });
    createImageBitmap(blob).then((bmp) => {
      // An older preview is stale, unless it is the frame picked on the chart (a seek answer).
      if (frame < S.previewFrame && frame !== S.picked) { bmp.close(); return; }
      if (S.preview) S.preview.close();
      S.preview = bmp; S.previewFrame = frame;
      body.dataset.preview = String(frame);
      dirty();
    }, (e) => { body.dataset.previewError = String(e); });
  }

  function onHeat(dv) {
    if (dv.byteLength < 12) return;
    const frame = dv.getUint32(4, true), w = dv.getUint16(8, true), h = dv.getUint16(10, true);
    if (12 + w * h > dv.byteLength || w === 0 || h === 0) return;
    const cells = new Uint8Array(dv.buffer, dv.byteOffset + 12, w * h);
    const c = layerCanvas("heat", w, h);
    const img = c.ctx.createImageData(w, h);
    const px = new Uint32Array(img.data.buffer);
    for (let i = 0; i < cells.length; i++) px[i] = HEAT_LUT[cells[i]];
    c.ctx.putImageData(img, 0, 0);
    // A heat cell covers f grid cells of tile pixels each (server max-pools).
    const f = Math.max(1, Math.ceil(S.gw / w));
    S.heat = { canvas: c.canvas, w, h, cellPx: f * S.tile, cells: cells.slice() };
    S.heatFrame = frame;
    body.dataset.heat = String(frame);
    dirty();
  }

  function findFrame(f) {
    let lo = 0, hi = S.fr.length - 1;
    while (lo < hi) {
      const mid = (lo + hi) >> 1;
      if (S.fr[mid] < f) lo = mid + 1; else hi = mid;
    }
    return S.fr.length ? lo : -1;
  }

  function addAlarm(a) {
    if (!a || typeof a.frame !== "number") return;
    S.alarms.set(a.frame, Object.assign(S.alarms.get(a.frame) || {}, a));
    body.dataset.alarms = String(S.alarms.size);
  }

  function updateFacts() {
    const f = S.cur ? S.cur.frame : (S.fr.length ? S.fr[S.fr.length - 1] : -1);
    const total = S.status.frames_total > 0 ? S.status.frames_total : 0; // -1: a live feed, no end known
    const seen = S.status.frames_seen || 0;
    const ft = f >= 0 ? "frame " + intText(f) + (total ? " of " + intText(total) : "") :
      seen > 0 ? intText(seen) + " reference frames read" : "–";
    $("f-frame").textContent = ft;
    const fc = $("frame-count");
    fc.hidden = f < 0; fc.textContent = ft;
    const g = S.cur ? S.cur.g : S.status.g, lim = S.cur ? S.cur.limit : S.limit;
    $("f-g").textContent = fmt(g) + " / " + (lim > 0 ? fmt(lim) : "not set yet");
    const p = S.params || {};
    const streams = S.gw * S.gh;
    let bt = p.budget !== undefined ? String(p.budget) : "–";
    if (S.cur && S.cur.readCount !== undefined && streams) {
      bt += " (" + (S.cur.scale > 1 ? "about " : "") + intText(S.cur.readCount) + " of " + intText(streams) + (S.cur.scale > 1 ? " streams, shown in blocks of " + S.cur.scale + " × " + S.cur.scale : " streams") + ")";
    }
    if (p.policy) bt += ", " + p.policy;
    $("f-budget").textContent = bt;
    const fps = S.status.frames_per_second;
    $("f-speed").textContent = fps > 0 ? fmt(fps, 1) + " frames per second" : "–";
  }

  // ---------- frame view ----------

  const view = { zoom: 1, px: 0, py: 0, fitted: true, dpr: 1, hover: null };
  const layers = {};
  let needDraw = false, needChart = false;

  function layerCanvas(name, w, h) {
    let l = layers[name];
    if (!l || l.canvas.width !== w || l.canvas.height !== h) {
      const canvas = document.createElement("canvas");
      canvas.width = w; canvas.height = h;
      l = layers[name] = { canvas, ctx: canvas.getContext("2d") };
    }
    return l;
  }

  // Heat colours: transparent at 0, then dark violet -> rose -> yellow at the limit.
  const HEAT_LUT = (() => {
    const lut = new Uint32Array(256);
    const stops = [[0, 40, 30, 90], [0.55, 200, 60, 90], [1, 255, 230, 80]];
    for (let i = 0; i < 256; i++) {
      const t = i / 255;
      let k = 0;
      while (k < stops.length - 2 && t > stops[k + 1][0]) k++;
      const [t0, r0, g0, b0] = stops[k], [t1, r1, g1, b1] = stops[k + 1];
      const u = (t - t0) / (t1 - t0);
      const r = r0 + (r1 - r0) * u, g = g0 + (g1 - g0) * u, b = b0 + (b1 - b0) * u;
      const ramp = Math.min(1, Math.max(0, (t - 0.04) / 0.56)); // smoothstep: near-zero stays see-through
      const a = Math.round(230 * ramp * ramp * (3 - 2 * ramp));
      lut[i] = ((a & 255) << 24) | ((b & 255) << 16) | ((g & 255) << 8) | (r & 255); // RGBA little-endian
    }
    return lut;
  })();

  // forEachCell calls fn with every marked cell index of u's mask:
  // bitset row-major LSB-first, or a sorted list of uvarint deltas.
  function forEachCell(u, fn) {
    const n = u.mw * u.mh, m = u.mask;
    if (u.enc === 0) {
      // Skip empty bytes; take the set bits of the others lowest first.
      for (let i = 0; i < m.length; i++) {
        let v = m[i];
        while (v) {
          const c = i * 8 + (31 - Math.clz32(v & -v));
          if (c >= n) return;
          fn(c);
          v &= v - 1;
        }
      }
      return;
    }
    let c = 0, i = 0, first = true;
    while (i < m.length) {
      let v = 0, shift = 0, byte;
      do {
        byte = m[i++];
        v += (byte & 0x7f) * 2 ** shift;
        shift += 7;
      } while (byte & 0x80 && i < m.length);
      c = first ? v : c + v;
      first = false;
      if (c >= n) break;
      fn(c);
    }
  }

  // maskLayer paints the read cells of u into a mw x mh layer.
  function maskLayer(u) {
    const { mw, mh } = u;
    if (!mw || !mh) return;
    const l = layerCanvas("mask", mw, mh);
    if (!l.img || l.img.width !== mw || l.img.height !== mh) {
      l.img = l.ctx.createImageData(mw, mh);
      l.px = new Uint32Array(l.img.data.buffer);
    }
    const px = l.px;
    px.fill(0);
    const [r, g, b] = COLORS.mask;
    const on = (255 << 24) | (b << 16) | (g << 8) | r;
    let count = 0;
    forEachCell(u, (c) => { px[c] = on; count++; });
    l.ctx.putImageData(l.img, 0, 0);
    u.readCount = count * (u.scale > 1 ? u.scale * u.scale : 1); // upper bound at coarse scales
    u.cells = count;
    body.dataset.maskCells = String(count);
    body.dataset.maskScale = String(u.scale);
  }

  function canvasSize() {
    const c = $("view");
    const dpr = window.devicePixelRatio || 1;
    const w = Math.max(1, Math.round(c.clientWidth * dpr)), h = Math.max(1, Math.round(c.clientHeight * dpr));
    if (c.width !== w || c.height !== h) { c.width = w; c.height = h; }
    view.dpr = dpr;
    return [w, h];
  }
  function fitView() {
    if (!S.W || !S.H) return;
    const [w, h] = canvasSize();
    view.zoom = Math.min(w / S.W, h / S.H) * 0.98;
    view.px = (S.W - w / view.zoom) / 2;
    view.py = (S.H - h / view.zoom) / 2;
    view.fitted = true;
    dirty();
  }
  function zoomAt(factor, cx, cy) {
    const [w, h] = canvasSize();
    if (cx === undefined) { cx = w / 2; cy = h / 2; }
    const sx = view.px + cx / view.zoom, sy = view.py + cy / view.zoom;
    const fitZoom = S.W ? Math.min(w / S.W, h / S.H) * 0.5 : 0.1;
    view.zoom = Math.max(fitZoom, Math.min(64 * view.dpr, view.zoom * factor));
    view.px = sx - cx / view.zoom;
    view.py = sy - cy / view.zoom;
    view.fitted = false;
    dirty();
  }
  // toCanvas maps source pixel coordinates to canvas pixels (tests use it).
  function toCanvas(x, y) { return [(x - view.px) * view.zoom, (y - view.py) * view.zoom]; }

  function dirty() { if (!needDraw) { needDraw = true; requestAnimationFrame(frameTick); } }
  function dirtyChart() { if (!needChart) { needChart = true; requestAnimationFrame(frameTick); } }
  function frameTick() {
    if (needDraw) { needDraw = false; drawView(); }
    if (needChart) { needChart = false; drawChart(); }
  }

  function drawView() {
    const c = $("view");
    const [w, h] = canvasSize();
    const ctx = c.getContext("2d");
    drawScene(ctx, w, h, view.zoom, view.px, view.py, view.dpr);
    body.dataset.drawn = String(S.cur ? S.cur.frame : -1);
    // Say when the picture is of another frame than the read pixels.
    const note = $("view-note");
    const off = S.cur && S.preview && S.previewFrame !== S.cur.frame &&
      (S.previewFrame === S.picked || Math.abs(S.previewFrame - S.cur.frame) > 50);
    note.textContent = off ? "Picture of frame " + S.previewFrame + (S.previewFrame === S.picked ? " (picked on the chart)" : "") +
      "; read pixels and live regions are those of frame " + S.cur.frame + "." : "";
    // What this drawing outlined, so a test can find the outline's pixels.
    body.dataset.drawnRegions = JSON.stringify(S.cur && $("show-regions").checked ?
      S.cur.regions.map((r) => [r.x0, r.y0, r.x1, r.y1]) : []);
  }

  // drawScene draws preview, read mask, heat and regions with the given
  // transform (canvas px = (source px - p) * zoom); the PNG snapshot reuses it.
  function drawScene(ctx, w, h, zoom, px, py, lw) {
    ctx.setTransform(1, 0, 0, 1, 0, 0);
    ctx.fillStyle = "#1b1d20";
    ctx.fillRect(0, 0, w, h);
    if (!S.W || !S.H || (!S.preview && !S.cur)) {
      // Nothing to show yet: say why, in the middle of the view.
      const st = body.dataset.state;
      const cal = S.status.calibration;
      let msg = "Waiting for the first frame…";
      const rf = (S.params && S.params.reference_frames) || 0;
      if (st === "learning") msg = "Learning what normal looks like from the reference frames" +
        (rf && S.status.frames_seen ? ": " + S.status.frames_seen + " of " + rf : "…");
      if (st === "calibrating") msg = "Setting the control limit for the false-alarm target" + (cal && cal.progress > 0 ? ": " + Math.round(cal.progress * 100) + "%" : "…");
      else if (st === "queued") msg = "Waiting to start…";
      else if (st === "failed") msg = "The review stopped; see the message above.";
      else if (st === "offline") msg = "Connection lost; trying again…";
      ctx.fillStyle = "#c9ccd1"; ctx.textAlign = "center"; ctx.textBaseline = "middle";
      ctx.font = (14 * lw) + "px DejaVu Sans, sans-serif";
      ctx.fillText(msg, w / 2, h / 2);
      ctx.textAlign = "start"; ctx.textBaseline = "alphabetic";
      if (!S.W || !S.H) return;
      if (!S.preview && !S.cur) return;
    }
    ctx.imageSmoothingEnabled = false;
    ctx.setTransform(zoom, 0, 0, zoom, -px * zoom, -py * zoom);
    ctx.fillStyle = "#3a3d42";
    ctx.fillRect(0, 0, S.W, S.H);
    if (S.preview) ctx.drawImage(S.preview, 0, 0, S.W, S.H);
    if ($("show-heat").checked && S.heat) {
      const e = S.heat.cellPx;
      ctx.globalAlpha = 0.85;
      ctx.drawImage(S.heat.canvas, 0, 0, S.heat.w * e, S.heat.h * e);
      ctx.globalAlpha = 1;
    }
    const e = S.cur ? S.cur.scale * S.tile : 1;
    const hollow = zoom * e >= 10 * lw; // zoomed in: outline read cells so the pixel stays visible
    if ($("show-mask").checked && layers.mask && S.cur && !hollow) {
      ctx.globalAlpha = S.preview ? 0.55 : 0.8;
      ctx.drawImage(layers.mask.canvas, 0, 0, S.cur.mw * e, S.cur.mh * e);
      ctx.globalAlpha = 1;
    }
    ctx.setTransform(1, 0, 0, 1, 0, 0);
    if ($("show-mask").checked && layers.mask && S.cur && hollow) {
      const u = S.cur, mpx = layers.mask.px;
      const cx0 = Math.max(0, Math.floor(px / e)), cy0 = Math.max(0, Math.floor(py / e));
      const cx1 = Math.min(u.mw - 1, Math.floor((px + w / zoom) / e)), cy1 = Math.min(u.mh - 1, Math.floor((py + h / zoom) / e));
      const [r, g, b] = COLORS.mask;
      ctx.strokeStyle = "rgb(" + r + "," + g + "," + b + ")";
      ctx.lineWidth = Math.max(1, Math.min(3 * lw, zoom * e / 8));
      const inset = ctx.lineWidth / 2 + lw;
      ctx.beginPath();
      for (let cy = cy0; cy <= cy1; cy++) {
        for (let cx = cx0; cx <= cx1; cx++) {
          if (mpx[cy * u.mw + cx] === 0) continue;
          const x = (cx * e - px) * zoom, y = (cy * e - py) * zoom, s = e * zoom;
          ctx.rect(x + inset, y + inset, s - 2 * inset, s - 2 * inset);
        }
      }
      ctx.stroke();
    }
    // Frame border, so a small frame is easy to find.
    ctx.strokeStyle = "#6d7178";
    ctx.lineWidth = 1;
    ctx.strokeRect(Math.round(-px * zoom) - 0.5, Math.round(-py * zoom) - 0.5, Math.round(S.W * zoom) + 1, Math.round(S.H * zoom) + 1);
    if ($("show-regions").checked) {
      // Besides the live regions: the alarm picked on the chart or list, or
      // else the latest alarm once it is over, dashed.
      const live = S.cur && S.cur.regions.length > 0;
      const pa = S.picked >= 0 ? alarmAt(S.picked) : null;
      const eps = alarmEpisodes();
      const old = pa || (!live && eps.length ? eps[eps.length - 1][2] : null);
      if (old && (!live || old.frame !== (alarmAt(S.cur.frame) || {}).frame)) {
        for (const r of old.regions || []) {
          const b = r.bbox || [0, 0, 0, 0];
          drawBox(ctx, { x0: b[0], y0: b[1], x1: b[2], y1: b[3], peak: r.peak }, zoom, px, py, lw, pa ? COLORS.picked : COLORS.region, true, false);
        }
      }
      if (S.cur) {
        // Label only the strongest few, so many small regions stay readable.
        const top = S.cur.regions.slice().sort((p, q) => q.peak - p.peak).slice(0, 3);
        for (const r of S.cur.regions) drawBox(ctx, r, zoom, px, py, lw, COLORS.region, false, top.includes(r));
      }
    }
  }

  function drawBox(ctx, r, zoom, px, py, lw, color, dashed, label) {
    let x0 = (r.x0 - px) * zoom, y0 = (r.y0 - py) * zoom;
    let x1 = (r.x1 + 1 - px) * zoom, y1 = (r.y1 + 1 - py) * zoom;
    const min = 8 * lw; // keep a one-pixel region visible when zoomed out
    if (x1 - x0 < min) { const m = (x0 + x1) / 2; x0 = m - min / 2; x1 = m + min / 2; }
    if (y1 - y0 < min) { const m = (y0 + y1) / 2; y0 = m - min / 2; y1 = m + min / 2; }
    const pad = lw; // outline sits just outside the box
    ctx.save();
    ctx.lineWidth = 2 * lw;
    ctx.strokeStyle = color;
    ctx.setLineDash(dashed ? [5 * lw, 4 * lw] : []);
    ctx.strokeRect(x0 - pad, y0 - pad, x1 - x0 + 2 * pad, y1 - y0 + 2 * pad);
    if (label && r.peak !== undefined) {
      ctx.font = (11 * lw) + "px DejaVu Sans, sans-serif";
      const t = "peak " + fmt(r.peak, 1);
      const tw = ctx.measureText(t).width;
      const ty = y0 - 5 * lw > 14 * lw ? y0 - 5 * lw : y1 + 15 * lw; // above the box, or below at the top edge
      ctx.fillStyle = "rgba(20, 22, 25, 0.75)";
      ctx.fillRect(x0 - 2 * lw, ty - 11 * lw, tw + 4 * lw, 14 * lw);
      ctx.fillStyle = color;
      ctx.fillText(t, x0, ty);
    }
    ctx.restore();
  }

  function wireView() {
    const c = $("view");
    $("zoom-in").onclick = () => zoomAt(2);
    $("zoom-out").onclick = () => zoomAt(0.5);
    $("zoom-fit").onclick = () => fitView();
    $("zoom-px").onclick = () => {
      const target = 16 * view.dpr;
      const hv = view.hover;
      const [w, h] = canvasSize();
      const [cx, cy] = hv ? toCanvas(hv[0] + 0.5, hv[1] + 0.5) : (S.cur && S.cur.regions[0] ?
        toCanvas((S.cur.regions[0].x0 + S.cur.regions[0].x1 + 1) / 2, (S.cur.regions[0].y0 + S.cur.regions[0].y1 + 1) / 2) : [w / 2, h / 2]);
      // Bring the point of interest to the centre at 16 screen px per source px.
      const sx = view.px + cx / view.zoom, sy = view.py + cy / view.zoom;
      view.zoom = target;
      view.px = sx - w / 2 / view.zoom; view.py = sy - h / 2 / view.zoom;
      view.fitted = false;
      dirty();
    };
    for (const id of ["show-mask", "show-regions"]) $(id).onchange = dirty;
    $("show-heat").onchange = (e) => {
      send({ type: "heat", on: e.target.checked });
      dirty();
      if (!e.target.checked) return;
      const asked = S.heatFrame;
      setTimeout(() => {
        if ($("show-heat").checked && S.heatFrame === asked)
          $("readout").textContent = ["finished", "stopped", "failed"].includes(body.dataset.state) ?
            "Heat images come only while frames are being watched." : "No heat image has come from the server yet.";
      }, 3000);
    };
    c.addEventListener("wheel", (e) => {
      e.preventDefault();
      const r = c.getBoundingClientRect();
      zoomAt(e.deltaY < 0 ? 1.25 : 0.8, (e.clientX - r.left) * view.dpr, (e.clientY - r.top) * view.dpr);
    }, { passive: false });
    let drag = null;
    c.addEventListener("pointerdown", (e) => { drag = [e.clientX, e.clientY, view.px, view.py]; c.setPointerCapture(e.pointerId); });
    c.addEventListener("pointerup", () => { drag = null; });
    c.addEventListener("pointermove", (e) => {
      const r = c.getBoundingClientRect();
      if (drag) {
        view.px = drag[2] - (e.clientX - drag[0]) * view.dpr / view.zoom;
        view.py = drag[3] - (e.clientY - drag[1]) * view.dpr / view.zoom;
        view.fitted = false;
        dirty();
      }
      const sx = Math.floor(view.px + (e.clientX - r.left) * view.dpr / view.zoom);
      const sy = Math.floor(view.py + (e.clientY - r.top) * view.dpr / view.zoom);
      view.hover = (sx >= 0 && sy >= 0 && sx < S.W && sy < S.H) ? [sx, sy] : null;
      readout();
    });
    c.addEventListener("pointerleave", () => { view.hover = null; readout(); });
  }

  function readout() {
    const el = $("readout");
    if (!view.hover) { el.textContent = "Move over the frame to read a pixel. Scroll to zoom, drag to move."; return; }
    const [x, y] = view.hover;
    let t = "pixel x " + x + ", y " + y;
    const k = S.tile;
    if (k > 1) t += " · stream " + Math.floor(x / k) + ", " + Math.floor(y / k);
    const u = S.cur;
    if (u && u.mw) {
      const e = u.scale * k;
      const cx = Math.floor(x / e), cy = Math.floor(y / e);
      const on = layers.mask && layers.mask.px && layers.mask.px[cy * u.mw + cx] !== 0;
      t += on ? " · read this frame" : " · not read this frame";
      if (u.scale > 1 && on) t += " (somewhere in its " + u.scale + " × " + u.scale + " block)";
    }
    if (S.heat && $("show-heat").checked) {
      const e = S.heat.cellPx;
      const v = S.heat.cells[Math.floor(y / e) * S.heat.w + Math.floor(x / e)];
      if (v !== undefined) t += " · local statistic " + (v >= 255 ? "at or above" : Math.round(v / 2.55) + "% of") + " the limit";
    }
    t += " · zoom " + fmt(view.zoom / view.dpr, 2) + "×";
    el.textContent = t;
  }

  // ---------- statistic chart ----------

  const chart = { x0: 46, x1: 0, y0: 0, y1: 0, fmax: 1, ymax: 1, dpr: 1 };

  function alarmEpisodes() {
    const lastF = S.fr.length ? S.fr[S.fr.length - 1] : 0;
    return [...S.alarms.values()].sort((a, b) => a.frame - b.frame)
      .map((a) => [a.frame, (a.end_frame === undefined || a.end_frame === null || a.end_frame < 0) ? lastF : a.end_frame, a]);
  }
  function alarmAt(f) {
    let best = null;
    for (const [s, e, a] of alarmEpisodes()) if (f >= s && f <= e) best = a;
    return best;
  }
  function chartX(f) { return chart.x0 + (f / chart.fmax) * (chart.x1 - chart.x0); }
  // On the log scale the axis shows log10(1 + v), so 0 stays at the bottom.
  function chartT(v) { return chart.log ? Math.log10(1 + Math.max(0, v)) : v; }
  function chartY(v) { return chart.y1 - (Math.min(chartT(v), chartT(chart.ymax)) / chartT(chart.ymax)) * (chart.y1 - chart.y0); }

  function drawChart() {
    const c = $("chart");
    const dpr = window.devicePixelRatio || 1;
    const W = Math.max(1, Math.round(c.clientWidth * dpr)), H = Math.max(1, Math.round(c.clientHeight * dpr));
    if (c.width !== W || c.height !== H) { c.width = W; c.height = H; }
    const ctx = c.getContext("2d");
    ctx.setTransform(1, 0, 0, 1, 0, 0);
    ctx.fillStyle = "#fff"; ctx.fillRect(0, 0, W, H);
    chart.dpr = dpr;
    chart.x0 = 50 * dpr; chart.x1 = W - 10 * dpr; chart.y0 = 10 * dpr; chart.y1 = H - 24 * dpr;
    const n = S.fr.length;
    const lastF = n ? S.fr[n - 1] : 0;
    chart.fmax = Math.max(10, (S.status.frames_total || 0) - 1, lastF);
    let gmax = 0;
    for (let i = 0; i < n; i++) if (S.g[i] > gmax && Number.isFinite(S.g[i])) gmax = S.g[i];
    const lim = S.limit || 0;
    chart.log = $("chart-log").checked;
    chart.ymax = lim > 0 ? Math.max(lim * 1.4, Math.min(gmax, lim * 4)) * 1.05 : Math.max(gmax * 1.1, 1);
    if (chart.log) chart.ymax = Math.max(gmax, lim, 1) * 1.5;
    ctx.font = (11 * dpr) + "px DejaVu Sans, sans-serif";
    // Learning reference period.
    const rf = (S.params && S.params.reference_frames) || 0;
    if (rf > 0) {
      ctx.fillStyle = COLORS.learn;
      ctx.fillRect(chartX(0), chart.y0, chartX(Math.min(rf, chart.fmax)) - chartX(0), chart.y1 - chart.y0);
    }
    // Alarm episodes.
    ctx.fillStyle = COLORS.episode;
    for (const [s, e] of alarmEpisodes()) {
      const xa = chartX(s), xb = Math.max(chartX(e + 1), xa + 3 * dpr);
      ctx.fillRect(xa, chart.y0, xb - xa, chart.y1 - chart.y0);
    }
    // Axes and grid.
    ctx.strokeStyle = "#d9d6cc"; ctx.lineWidth = 1; ctx.fillStyle = "#6a6f76";
    ctx.textAlign = "right"; ctx.textBaseline = "middle";
    const ys = niceStep(chart.ymax / 4);
    const ticks = [];
    if (chart.log) { ticks.push(0); for (let v = 1; v <= chart.ymax; v *= 10) ticks.push(v); }
    else for (let v = 0; v <= chart.ymax * 1.0001; v += ys) ticks.push(v);
    for (const v of ticks) {
      const y = Math.round(chartY(v)) + 0.5;
      ctx.beginPath(); ctx.moveTo(chart.x0, y); ctx.lineTo(chart.x1, y); ctx.stroke();
      ctx.fillText(chart.log ? (v >= 1e4 ? v.toExponential(0) : String(v)) :
        ys < 1 ? v.toFixed(-Math.floor(Math.log10(ys))) : String(Math.round(v)), chart.x0 - 4 * dpr, y);
    }
    ctx.textAlign = "center"; ctx.textBaseline = "top";
    const step = niceStep(chart.fmax / 6);
    for (let f = 0; f <= chart.fmax; f += Math.max(1, Math.round(step))) ctx.fillText(String(f), chartX(f), chart.y1 + 5 * dpr);
    // Control limit (per-frame values, drawn as steps).
    if (n || lim > 0) {
      ctx.strokeStyle = COLORS.limit; ctx.lineWidth = 1.5 * dpr; ctx.setLineDash([6 * dpr, 4 * dpr]);
      ctx.beginPath();
      if (n === 0) { ctx.moveTo(chart.x0, chartY(lim)); ctx.lineTo(chart.x1, chartY(lim)); }
      let prev = null;
      for (let i = 0; i < n; i++) {
        const l = S.lim[i] > 0 ? S.lim[i] : 0;
        if (l <= 0) { prev = null; continue; }
        const x = chartX(S.fr[i]), y = chartY(l);
        if (prev === null) ctx.moveTo(x, y); else { ctx.lineTo(x, prev); ctx.lineTo(x, y); }
        prev = y;
      }
      if (prev !== null) ctx.lineTo(chart.x1, prev);
      ctx.stroke(); ctx.setLineDash([]);
    }
    // Statistic: one min-max bar per canvas column when frames outnumber columns.
    ctx.strokeStyle = COLORS.g; ctx.lineWidth = 1.5 * dpr;
    ctx.beginPath();
    let col = -1, lo = 0, hi = 0, started = false;
    const flush = () => {
      if (col < 0) return;
      if (!started) { ctx.moveTo(col, chartY(lo)); started = true; } else ctx.lineTo(col, chartY(lo));
      if (hi !== lo) ctx.lineTo(col, chartY(hi));
    };
    for (let i = 0; i < n; i++) {
      const v = Number.isFinite(S.g[i]) ? S.g[i] : chart.ymax;
      const x = Math.round(chartX(S.fr[i]));
      if (x !== col) { flush(); col = x; lo = hi = v; } else { lo = Math.min(lo, v); hi = Math.max(hi, v); }
    }
    flush();
    ctx.stroke();
    if (!chart.log && n > 10 && lim > 0 && gmax > 0 && gmax * 10 < lim) {
      ctx.fillStyle = COLORS.g; ctx.textAlign = "right"; ctx.textBaseline = "top";
      ctx.fillText("the statistic is far below the limit: tick \u201clog scale\u201d to see it", chart.x1 - 4 * dpr, chart.y0 + 2 * dpr);
    }
    if (gmax > chart.ymax) {
      ctx.fillStyle = COLORS.g; ctx.textAlign = "right"; ctx.textBaseline = "top";
      ctx.fillText("statistic goes off the top, up to " + fmt(gmax, 0), chart.x1 - 4 * dpr, chart.y0 + 2 * dpr);
    }
    // Picked frame.
    if (S.picked >= 0) {
      const x = Math.round(chartX(S.picked)) + 0.5;
      ctx.strokeStyle = "#b8860b"; ctx.lineWidth = 2 * dpr;
      ctx.beginPath(); ctx.moveTo(x, chart.y0); ctx.lineTo(x, chart.y1); ctx.stroke();
    }
    if (n === 0) {
      ctx.fillStyle = "#6a6f76"; ctx.textAlign = "center"; ctx.textBaseline = "middle";
      ctx.fillText("no frames yet", (chart.x0 + chart.x1) / 2, (chart.y0 + chart.y1) / 2);
    }
    body.dataset.chartFrames = String(n);
    body.dataset.chartEpisodes = String(S.alarms.size);
  }
  function niceStep(x) {
    if (!(x > 0)) return 1;
    const p = 10 ** Math.floor(Math.log10(x));
    for (const m of [1, 2, 5, 10]) if (m * p >= x) return m * p;
    return 10 * p;
  }

  function frameFromChart(ev) {
    const c = $("chart"), r = c.getBoundingClientRect();
    const x = (ev.clientX - r.left) * chart.dpr;
    const f = Math.round((x - chart.x0) / (chart.x1 - chart.x0) * chart.fmax);
    return Math.max(0, Math.min(chart.fmax, f));
  }
  function wireChart() {
    const c = $("chart");
    c.addEventListener("click", (ev) => pickFrame(frameFromChart(ev)));
    $("chart-log").addEventListener("change", dirtyChart);
    c.addEventListener("mousemove", (ev) => {
      const f = frameFromChart(ev);
      const i = findFrame(f);
      let t = "frame " + f;
      if (i >= 0 && S.fr[i] === f) t += ": statistic " + fmt(S.g[i]) + ", limit " + (S.lim[i] > 0 ? fmt(S.lim[i]) : "not set");
      const a = alarmAt(f);
      if (a) t += " · inside the alarm that started at frame " + a.frame;
      $("chart-readout").textContent = t;
    });
    c.addEventListener("mouseleave", () => { $("chart-readout").textContent = ""; });
  }

  // pickFrame highlights frame f and its alarm; the owner also asks the
  // server to show that frame.
  function pickFrame(f) {
    S.picked = f;
    body.dataset.picked = String(f);
    const a = alarmAt(f);
    body.dataset.pickedAlarm = a ? String(a.frame) : "";
    if (S.role === "owner") send({ type: "seek", frame: f });
    const i = findFrame(f);
    let t = "Picked frame " + f;
    if (i >= 0 && S.fr[i] === f) t += ": statistic " + fmt(S.g[i]) + (S.lim[i] > 0 ? " against the limit " + fmt(S.lim[i]) : "");
    t += a ? ". It is inside the alarm that started at frame " + a.frame + "; its regions are dashed yellow." : ". No alarm at this frame.";
    if (S.role !== "owner") t += " (Only the owner link can ask for that frame's picture.)";
    $("picked-note").textContent = t;
    renderAlarms();
    dirty(); dirtyChart();
  }

  // ---------- alarm list ----------

  function renderAlarms() {
    const tb = $("alarms").querySelector("tbody");
    tb.innerHTML = "";
    const eps = alarmEpisodes();
    $("no-alarms").hidden = eps.length > 0;
    $("alarm-count").textContent = eps.length ? "(" + eps.length + ")" : "";
    const pa = S.picked >= 0 ? alarmAt(S.picked) : null;
    for (const [, , a] of eps) {
      const tr = document.createElement("tr");
      if (pa && pa.frame === a.frame) tr.className = "picked";
      const regs = (a.regions || []).slice().sort((p, q) => (q.peak || 0) - (p.peak || 0));
      const onsets = regs.map((r) => r.onset).filter((v) => typeof v === "number");
      const began = onsets.length ? Math.min(...onsets) : null;
      const b = regs[0] && regs[0].bbox;
      const where = b ? b[0] + "," + b[1] + " – " + b[2] + "," + b[3] + (regs.length > 1 ? " (+" + (regs.length - 1) + " more)" : "") : "–";
      const ended = (a.end_frame === undefined || a.end_frame === null || a.end_frame < 0) ? "going on" : String(a.end_frame);
      for (const v of [String(a.frame), began === null ? "–" : String(began), ended, where, fmt(a.peak, 1)]) {
        const td = document.createElement("td"); td.textContent = v; tr.appendChild(td);
      }
      tr.addEventListener("click", () => pickFrame(a.frame));
      tb.appendChild(tr);
    }
  }

  // ---------- settings (owner) ----------

  function field(name) { return document.querySelector("#settings [name='" + name + "']"); }

  function fillSettings(p) {
    if (!p) return;
    if (document.activeElement !== field("calibration")) {
      field("calibration").value = p.limit > 0 ? "fixed" : (p.calibration || "estimated");
      if (p.limit > 0) field("limit").value = p.limit;
      field("limit").disabled = !(p.limit > 0) || S.role !== "owner";
    }
    for (const k of ["budget", "policy", "top_r", "shift", "compensation", "tile", "reference_frames", "model", "arl0", "pace"]) {
      const el = field(k);
      if (el && p[k] !== undefined && document.activeElement !== el) el.value = p[k];
    }
    showTarget();
  }

  // targetFrames turns the false-alarm target into frames: directly, or
  // hours * 3600 * frames per second.
  function targetFrames() {
    const mode = document.querySelector("#settings [name='arl0-mode']:checked").value;
    if (mode === "hours") {
      const h = parseFloat(field("hours").value), fps = parseFloat(field("fps").value);
      return h > 0 && fps > 0 ? Math.round(h * 3600 * fps) : NaN;
    }
    return Math.round(parseFloat(field("arl0").value));
  }
  // targetParams is the target as the server takes it: {arl0} in frames, or
  // {per_hours, fps}, which the server turns into frames and states.
  function targetParams() {
    const mode = document.querySelector("#settings [name='arl0-mode']:checked").value;
    const a = targetFrames();
    if (!(Number.isFinite(a) && a > 0)) return {};
    if (mode === "hours") return { per_hours: parseFloat(field("hours").value), fps: parseFloat(field("fps").value) };
    return { arl0: a };
  }
  function showTarget() {
    const n = targetFrames();
    const el = $("arl0-frames");
    el.textContent = Number.isFinite(n) && n > 0 ?
      "= one false alarm per " + intText(n) + " frames on average (in-control run length)" : "Give a positive number.";
    body.dataset.arl0 = Number.isFinite(n) ? String(n) : "";
  }

  function collectParams() {
    const p = {};
    const budget = field("budget").value.trim();
    if (budget) p.budget = budget;
    p.policy = field("policy").value;
    p.model = field("model").value;
    for (const k of ["top_r", "tile", "reference_frames"]) {
      const v = parseInt(field(k).value, 10);
      if (Number.isFinite(v)) p[k] = v;
    }
    for (const k of ["shift", "compensation", "pace"]) {
      const v = parseFloat(field(k).value);
      if (Number.isFinite(v)) p[k] = v;
    }
    Object.assign(p, targetParams());
    // A fixed limit skips calibration; 0 asks for calibration again.
    const how = field("calibration").value;
    if (how === "fixed") {
      const h = parseFloat(field("limit").value);
      if (h > 0) p.limit = h;
    } else {
      p.calibration = how;
      p.limit = 0;
    }
    return p;
  }

  function wireSettings() {
    const form = $("settings");
    form.addEventListener("input", showTarget);
    field("calibration").addEventListener("change", () => { field("limit").disabled = field("calibration").value !== "fixed"; });
    form.addEventListener("change", showTarget);
    form.addEventListener("submit", async (e) => {
      e.preventDefault();
      if (S.role !== "owner") return;
      const msg = $("settings-msg");
      msg.textContent = "Sending…";
      try {
        const st = await api("PATCH", "/api/sessions/" + encodeURIComponent(S.id) + "/params", collectParams(), S.token);
        msg.textContent = "Applied; the review starts again from frame 0.";
        resetHistory();
        if (st && typeof st === "object") onStatus(st);
        fillSettings(S.params);
        dirty(); dirtyChart();
      } catch (err) {
        msg.textContent = "Not applied: " + err.message;
      }
    });
    $("calibrate").addEventListener("click", async () => {
      if (S.role !== "owner") return;
      const a = targetFrames();
      setProgress($("cal-progress"), 0, "starting…");
      $("cal-result").textContent = "";
      try {
        // The server sets the limit when a run starts: changing only the
        // target starts a new run, which calibrates first.
        if (!(a > 0)) throw new Error("give a positive false-alarm target");
        const st = await api("POST", "/api/sessions/" + encodeURIComponent(S.id) + "/calibrate", Object.assign(targetParams(),
          { limit: 0, calibration: field("calibration").value === "fixed" ? "estimated" : field("calibration").value }), S.token);
        resetHistory();
        if (st && typeof st === "object") onStatus(st);
        $("settings-msg").textContent = "New target sent; the limit is being set, then the review starts again.";
      } catch (err) {
        setProgress($("cal-progress"), 0, "failed");
        $("cal-result").textContent = "Could not set the limit: " + err.message;
      }
    });
    showTarget();
  }

  // ---------- compare (owner) ----------

  function wireCompare() {
    const box = $("compare-policies");
    for (const [v] of POLICIES) {
      const l = document.createElement("label");
      l.innerHTML = "<input type=checkbox value='" + v + "'> " + v + " ";
      box.appendChild(l);
    }
    for (const cb of box.querySelectorAll("input")) cb.checked = ["random", "stride"].includes(cb.value);
    $("compare").addEventListener("click", async () => {
      if (S.role !== "owner") return;
      const pols = [...box.querySelectorAll("input:checked")].map((x) => x.value);
      const out = $("compare-out");
      out.innerHTML = "";
      if (pols.length === 0) { out.textContent = "Tick at least one way of picking pixels."; return; }
      const prog = $("compare-progress");
      setProgress(prog, 0.1, "running " + pols.length + " more " + (pols.length === 1 ? "review" : "reviews") + "…");
      $("compare").disabled = true;
      try {
        const r = await api("POST", "/api/sessions/" + encodeURIComponent(S.id) + "/compare", { policies: pols }, S.token);
        showCompare(r);
        setProgress(prog, 1, "done: " + ($("compare-out").querySelectorAll(".run").length) + " runs on the same frames");
      } catch (err) {
        setProgress(prog, 0, "failed");
        out.textContent = err.status === 404 || err.status === 405 ?
          "This server cannot compare policies yet." : "Compare failed: " + err.message;
      } finally {
        $("compare").disabled = false;
      }
    });
  }

  // showCompare draws one card per run: policy, alarms, first alarm, pixels
  // read, and a small statistic chart when the run carries its series.
  function showCompare(r) {
    const out = $("compare-out");
    out.innerHTML = "";
    const runs = Array.isArray(r) ? r : (r && (r.runs || r.results)) || [];
    body.dataset.compareRuns = String(runs.length);
    for (const run of runs) {
      const rep = run.report || run;
      const div = document.createElement("div");
      div.className = "run" + (run.policy === (S.params && S.params.policy) ? " current" : "");
      const h = document.createElement("h3");
      h.textContent = run.policy || (rep.params && rep.params.policy) || "run";
      div.appendChild(h);
      const alarms = rep.alarms || [];
      const first = alarms.length ? alarms[0].frame : null;
      const lines = [
        (Array.isArray(alarms) ? alarms.length : alarms) + (alarms.length === 1 ? " alarm" : " alarms"),
        "first alarm at frame " + (first === null ? "–" : first),
        rep.pixels_read !== undefined ? intText(rep.pixels_read) + " pixels read" : "",
        rep.control_limit !== undefined ? "limit " + fmt(rep.control_limit) : "",
      ];
      if (run.delay !== undefined) lines.push("delay " + fmt(run.delay, 1) + " frames");
      for (const t of lines.filter(Boolean)) { const p = document.createElement("div"); p.textContent = t; div.appendChild(p); }
      const g = run.g || rep.g;
      if (Array.isArray(g) && g.length) {
        const cv = document.createElement("canvas");
        div.appendChild(cv);
        requestAnimationFrame(() => miniChart(cv, run.frame || rep.frame, g, rep.control_limit || run.limit, alarms));
      }
      out.appendChild(div);
    }
    if (runs.length === 0) out.textContent = "The server answered with no runs.";
  }

  function miniChart(cv, fr, g, lim, alarms) {
    const dpr = window.devicePixelRatio || 1;
    const W = cv.width = Math.round(cv.clientWidth * dpr), H = cv.height = Math.round(cv.clientHeight * dpr);
    const ctx = cv.getContext("2d");
    const n = g.length, fmax = fr ? fr[n - 1] || 1 : n - 1 || 1;
    let ymax = lim > 0 ? lim * 2 : Math.max(...g.filter(Number.isFinite), 1);
    const X = (f) => f / fmax * (W - 2) + 1, Y = (v) => H - 1 - Math.min(v, ymax) / ymax * (H - 2);
    ctx.fillStyle = COLORS.episode;
    for (const a of alarms || []) ctx.fillRect(X(a.frame), 0, Math.max(2, X((a.end_frame >= 0 ? a.end_frame : fmax)) - X(a.frame)), H);
    if (lim > 0) { ctx.strokeStyle = COLORS.limit; ctx.setLineDash([4, 3]); ctx.beginPath(); ctx.moveTo(0, Y(lim)); ctx.lineTo(W, Y(lim)); ctx.stroke(); ctx.setLineDash([]); }
    ctx.strokeStyle = COLORS.g; ctx.beginPath();
    for (let i = 0; i < n; i++) { const x = X(fr ? fr[i] : i), y = Y(g[i]); if (i) ctx.lineTo(x, y); else ctx.moveTo(x, y); }
    ctx.stroke();
  }


  // ---------- live feeds: camera from this browser, live panel ----------

  // Live source kinds (status "source") -> words.
  const LIVE_WORDS = {
    "browser-camera": "camera of a browser", "camera-url": "camera on the network",
    folder: "folder on the server", stdin: "pipe into the server",
  };
  const MAX_IN_FLIGHT = 2;   // camera frames sent and not yet answered by the server
  const JPEG_QUALITY = 0.85;
  const cam = {
    on: false, stream: null, timer: 0, canvas: null, ctx: null, w: 320, h: 240, rate: 10,
    inflight: 0, sent: 0, answered: 0, held: 0, encoding: false, lastProgress: 0,
  };

  function sizeOf(v) { const [w, h] = String(v).split("x").map(Number); return [w || 320, h || 240]; }

  // The start page's camera card: creates a browser-camera session and opens
  // it; the watch page then starts the camera.
  function wireCameraForm() {
    const f = $("camera-form");
    const q = (n) => f.querySelector("[name=" + n + "]");
    let fpsTouched = false;
    q("fps").addEventListener("input", () => { fpsTouched = true; });
    const show = () => {
      if (!fpsTouched) q("fps").value = q("rate").value;
      const h = parseFloat(q("per_hours").value), fps = parseFloat(q("fps").value);
      $("camera-arl0").textContent = h > 0 && fps > 0 ?
        "= one false alarm per " + intText(h * 3600 * fps) + " frames on average" : "Give positive numbers.";
    };
    f.addEventListener("input", show);
    show();
    f.addEventListener("submit", async (e) => {
      e.preventDefault();
      const [w, h] = sizeOf(q("size").value);
      const rate = parseFloat(q("rate").value);
      const p = { per_hours: parseFloat(q("per_hours").value), fps: parseFloat(q("fps").value) };
      const budget = q("budget").value.trim();
      if (budget) p.budget = budget;
      for (const k of ["reference_frames", "tile"]) { const v = parseInt(q(k).value, 10); if (v > 0) p[k] = v; }
      const limit = parseFloat(q("limit").value);
      if (limit > 0) p.limit = limit;
      $("camera-start").disabled = true;
      try {
        const data = await api("POST", "/api/sessions", { source: { kind: "browser-camera" }, name: "camera " + w + " × " + h, params: p });
        remember(data.id, { camera: { w, h, rate }, camera_autostart: true });
        goToSession(data, "camera " + w + " × " + h);
      } catch (err) {
        $("camera-start").disabled = false;
        showError("Could not start a camera session: " + err.message);
      }
    });
  }

  // setupLive shows the live panel once for a live session and polls its
  // status (rates, drops, delay) every second.
  function setupLive(st) {
    if (S.live) return;
    S.live = st.source || (st.live && st.live.kind) || "live";
    body.dataset.live = S.live;
    $("live-card").hidden = false;
    $("live-kind").textContent = LIVE_WORDS[S.live] ? "(" + LIVE_WORDS[S.live] + ")" : "";
    if (S.live === "browser-camera" && S.role === "owner") {
      $("camera-box").hidden = false;
      const saved = loadStore()[S.id] || {};
      const c = saved.camera || {};
      if (c.w) $("camera-size").value = c.w + "x" + c.h;
      if (c.rate) $("camera-rate").value = c.rate;
      $("camera-toggle").addEventListener("click", () => { if (cam.on) stopCamera("The camera is off."); else startCamera(); });
      for (const id of ["camera-size", "camera-rate"]) $(id).addEventListener("change", () => { if (cam.on) { stopCamera(""); startCamera(); } });
      body.dataset.camera = "off";
      if (saved.camera_autostart) { remember(S.id, { camera_autostart: false }); startCamera(); }
    }
    pollLive();
    setInterval(pollLive, 1000);
  }

  let livePolling = false;
  async function pollLive() {
    if (livePolling) return;
    livePolling = true;
    try {
      showLive(await api("GET", "/api/sessions/" + encodeURIComponent(S.id), undefined, S.token));
    } catch { /* the websocket says when the server is gone */ } finally { livePolling = false; }
  }

  function showLive(st) {
    const l = st.live;
    if (!l) return;
    const bad = l.bad ? ", " + intText(l.bad) + " unreadable, skipped" : "";
    $("l-in").textContent = fmt(l.fps_in, 1) + " frames/s (" + intText(l.frames_in) + " in all" + bad + ")";
    $("l-mon").textContent = fmt(l.fps_monitored, 1) + " frames/s (" + intText(l.frames_monitored) + " in all)";
    $("l-drop").textContent = intText(l.dropped) + (cam.sent ? "; held back here while the server was busy: " + intText(cam.held) : "");
    const ms = (v) => fmt(v, v < 10 ? 1 : 0) + " ms";
    $("l-lat").textContent = l.latency_ms_median > 0 ? "median " + ms(l.latency_ms_median) + ", 95% within " + ms(l.latency_ms_p95) : "–";
    $("l-rule").textContent = l.arl0_rule || "–";
    $("live-reconnecting").hidden = !l.reconnecting;
    $("live-badge").hidden = !l.reconnecting;
    body.dataset.reconnecting = l.reconnecting ? "1" : "0";
    body.dataset.liveIn = String(l.frames_in);
    body.dataset.liveMonitored = String(l.frames_monitored);
    body.dataset.liveDropped = String(l.dropped);
    // Reference learning, then watching.
    const rf = (st.params && st.params.reference_frames) || 0;
    const ref = $("live-ref");
    if (st.state === "learning" && rf > 0) {
      const n = Math.min(st.frames_seen || 0, rf);
      setProgress(ref, n / rf, "learning what normal looks like: " + n + " of " + rf + " frames");
    } else if (st.state === "calibrating") {
      setProgress(ref, 1, "reference learnt; setting the control limit…");
    } else if (l.frames_monitored > 0 || ["watching", "alarm"].includes(st.state)) {
      setProgress(ref, 1, "reference learnt from " + rf + " frames; watching");
    } else if (st.state === "queued") {
      setProgress(ref, 0, "waiting for the first frames…");
    }
    // A target given per hours shows as such in the settings, once.
    if (l.per_hours > 0 && !S.liveTargetShown) {
      S.liveTargetShown = true;
      document.querySelector("#settings [name='arl0-mode'][value=hours]").checked = true;
      field("hours").value = l.per_hours;
      field("fps").value = l.fps;
      showTarget();
    }
    if (cam.on) cameraNote();
  }

  // Camera errors in plain words; the code also goes to data-camera-error.
  function failCamera(e) {
    const name = (e && e.name) || "";
    const words = {
      NotAllowedError: ["denied", "The camera was not allowed (permission denied by you or by the browser's settings). Allow the camera for this page and press Start again."],
      SecurityError: ["denied", "The browser does not let this page use a camera (permission denied)."],
      NotFoundError: ["no-device", "No camera was found. Connect one and press Start again."],
      NotReadableError: ["in-use", "The camera could not be started: another program or tab may be using it."],
      AbortError: ["in-use", "The camera could not be started: another program or tab may be using it."],
      OverconstrainedError: ["size", "The camera cannot give pictures of this size or rate; choose another."],
    }[name] || ["other", "The camera could not be started" + (name ? " (" + name + ")" : "") + ": " + ((e && e.message) || String(e))];
    cameraError(words[0], words[1]);
  }
  function cameraError(code, text) {
    const el = $("camera-error");
    el.hidden = !code;
    el.textContent = code ? text : "";
    if (code) {
      body.dataset.cameraError = code + ": " + text;
      body.dataset.camera = "error";
      $("camera-note").textContent = "The camera is off.";
    } else delete body.dataset.cameraError;
  }

  async function startCamera() {
    cameraError(null);
    const [w, h] = sizeOf($("camera-size").value);
    const rate = Math.max(0.2, Math.min(30, parseFloat($("camera-rate").value) || 10));
    remember(S.id, { camera: { w, h, rate } });
    if (!navigator.mediaDevices || !navigator.mediaDevices.getUserMedia) {
      cameraError("unavailable", "This browser gives this page no camera: a camera needs an https address, or a page served from this computer.");
      return;
    }
    body.dataset.camera = "starting";
    $("camera-note").textContent = "Asking for the camera…";
    $("camera-toggle").disabled = true;
    let stream;
    try {
      stream = await navigator.mediaDevices.getUserMedia({ audio: false,
        video: { width: { ideal: w }, height: { ideal: h }, frameRate: { ideal: rate } } });
      const v = $("camera-video");
      v.srcObject = stream;
      await v.play();
      for (let i = 0; !v.videoWidth && i < 100; i++) await new Promise((ok) => setTimeout(ok, 50));
      if (!v.videoWidth) throw Object.assign(new Error("the camera gave no picture within 5 seconds"), { name: "NoPicture" });
    } catch (e) {
      if (stream) for (const t of stream.getTracks()) t.stop();
      $("camera-toggle").disabled = false;
      failCamera(e);
      return;
    }
    Object.assign(cam, { on: true, stream, w, h, rate, inflight: 0, encoding: false, lastProgress: performance.now() });
    cam.canvas = document.createElement("canvas");
    cam.canvas.width = w; cam.canvas.height = h;
    cam.ctx = cam.canvas.getContext("2d");
    const track = stream.getVideoTracks()[0];
    const label = (track && track.label) || "camera";
    cam.label = label.length > 40 ? "…" + label.slice(-39) : label;
    if (track) track.addEventListener("ended", () => {
      if (cam.stream !== stream) return;
      stopCamera("");
      cameraError("ended", "The camera stopped sending pictures (unplugged, or turned off by the browser).");
    });
    cam.timer = setInterval(cameraTick, 1000 / rate);
    $("camera-toggle").disabled = false;
    $("camera-toggle").textContent = "Stop the camera";
    body.dataset.camera = "on";
    cameraNote();
  }

  function stopCamera(note) {
    clearInterval(cam.timer);
    if (cam.stream) for (const t of cam.stream.getTracks()) t.stop();
    cam.stream = null; cam.on = false; cam.encoding = false;
    $("camera-video").srcObject = null;
    $("camera-toggle").textContent = "Start the camera";
    if (note !== "") $("camera-note").textContent = note;
    if (body.dataset.camera === "on") body.dataset.camera = "off";
  }

  function cameraNote() {
    $("camera-note").textContent = "On (" + cam.label + "): " + cam.w + " × " + cam.h + ", up to " + fmt(cam.rate, 1) +
      " per second. Sent " + intText(cam.sent) + ", answered " + intText(cam.answered) + ".";
  }

  // cameraTick draws the camera's picture (cropped to fill) and sends it as a
  // JPEG, unless MAX_IN_FLIGHT frames are still unanswered: then the frame is
  // held back (not sent), so the server is never sent more than it takes.
  function cameraTick() {
    const ws = S.ws, v = $("camera-video");
    if (!cam.on || !ws || ws.readyState !== WebSocket.OPEN || !v.videoWidth) return;
    if (cam.inflight >= MAX_IN_FLIGHT && performance.now() - cam.lastProgress > 10000) cam.inflight = 0; // answers lost: start over
    if (cam.encoding || cam.inflight >= MAX_IN_FLIGHT || ws.bufferedAmount > (1 << 20)) {
      cam.held++;
      body.dataset.camHeld = String(cam.held);
      return;
    }
    const vw = v.videoWidth, vh = v.videoHeight, k = Math.max(cam.w / vw, cam.h / vh);
    const sw = cam.w / k, sh = cam.h / k;
    cam.ctx.drawImage(v, (vw - sw) / 2, (vh - sh) / 2, sw, sh, 0, 0, cam.w, cam.h);
    localPreview();
    cam.encoding = true;
    cam.canvas.toBlob((blob) => {
      cam.encoding = false;
      if (!blob || !cam.on || S.ws !== ws || ws.readyState !== WebSocket.OPEN) return;
      ws.send(blob);
      if (cam.inflight === 0) cam.lastProgress = performance.now();
      cam.inflight++; cam.sent++;
      body.dataset.camSent = String(cam.sent);
    }, "image/jpeg", JPEG_QUALITY);
  }

  // localPreview shows the picture just sent under the read pixels, at most
  // five times a second: the server's pictures of live frames (which share
  // viewers see) come later than this page has its own at hand.
  function localPreview() {
    const now = performance.now();
    if (now - (cam.previewAt || 0) < 200) return;
    cam.previewAt = now;
    createImageBitmap(cam.canvas).then((bmp) => {
      if (S.preview) S.preview.close();
      S.preview = bmp;
      S.previewFrame = S.cur ? S.cur.frame : 0;
      body.dataset.preview = "camera";
      dirty();
    }, () => {});
  }

  // The server answers each camera frame once it has taken (or dropped) it.
  function onCameraAck(m) {
    cam.inflight = Math.max(0, cam.inflight - 1);
    cam.answered++;
    cam.lastProgress = performance.now();
    body.dataset.camAnswered = String(cam.answered);
    if (typeof m.dropped === "number") body.dataset.camDropped = String(m.dropped);
  }

  // ---------- budget planner (owner) ----------

  const PLAN_POLICIES = [
    ["adaptive", true], ["thompson", false], ["spatial", false], ["random", true],
    ["stride", false], ["full", true], ["oracle", true],
  ];
  const PLAN_COLORS = {
    adaptive: "#2b5d8a", thompson: "#7a4f9a", spatial: "#1f8a70", random: "#b8862b",
    stride: "#8c8c8c", full: "#22262b", oracle: "#c63a22",
  };
  const planField = (n) => document.querySelector("#plan-form [name='" + n + "']");

  // planDefaults fills the frame size and tile from the session once known.
  function planDefaults() {
    if (!$("plan-form")) return;
    if (!planField("width").value && S.W) planField("width").value = S.W;
    if (!planField("height").value && S.H) planField("height").value = S.H;
    if (S.tile && !planField("tile").dataset.touched) planField("tile").value = S.tile;
  }

  function planRequest() {
    const num = (n) => { const v = parseFloat(planField(n).value); return Number.isFinite(v) ? v : 0; };
    const req = {
      width: num("width") | 0, height: num("height") | 0, tile: num("tile") | 0, shift: num("shift"),
      budgets: planField("budgets").value.split(",").map((x) => x.trim()).filter(Boolean),
      policies: [...document.querySelectorAll("#plan-policies input:checked")].map((x) => x.value),
      runs: num("runs") | 0, paths: num("paths") | 0, model: planField("model").value,
      target_delay: num("target_delay"),
    };
    if (planField("size-mode").value === "area") req.area = num("size"); else req.radius = num("size");
    const hours = document.querySelector("#plan-form [name='plan-arl0-mode'][value=hours]").checked;
    if (hours) { req.per_hours = num("per_hours"); req.fps = num("fps"); } else req.arl0 = num("arl0");
    return req;
  }

  function wirePlanner() {
    const box = $("plan-policies");
    box.append("Policies: ");
    for (const [v, on] of PLAN_POLICIES) {
      const l = document.createElement("label");
      const cb = document.createElement("input");
      cb.type = "checkbox"; cb.value = v; cb.checked = on;
      l.append(cb, " " + (v === "oracle" ? "oracle (knows where the change is: the bound)" : v === "full" ? "full (every pixel)" : v));
      box.appendChild(l);
    }
    planField("tile").addEventListener("input", () => { planField("tile").dataset.touched = "1"; });
    $("plan-run").disabled = S.role !== "owner";
    $("plan-form").addEventListener("submit", async (ev) => {
      ev.preventDefault();
      if (S.role !== "owner") return;
      $("plan-advice").textContent = "";
      body.dataset.planState = "running";
      delete body.dataset.planRecommended;
      setProgress($("plan-progress"), 0, "starting…");
      $("plan-run").disabled = true; $("plan-cancel").disabled = false;
      try {
        await api("POST", "/api/sessions/" + encodeURIComponent(S.id) + "/plan", planRequest(), S.token);
        planPoll();
      } catch (err) {
        planEnded();
        body.dataset.planState = "failed";
        setProgress($("plan-progress"), 0, "could not start: " + err.message);
      }
    });
    $("plan-cancel").addEventListener("click", async () => {
      try {
        await api("DELETE", "/api/sessions/" + encodeURIComponent(S.id) + "/plan", undefined, S.token);
      } catch (err) { setProgress($("plan-progress"), 0, "cancel failed: " + err.message); }
      loadPlan();
    });
    loadPlan();
  }

  function planEnded() { $("plan-run").disabled = S.role !== "owner"; $("plan-cancel").disabled = true; }

  // The websocket carries progress; a slow poll covers a lost connection.
  let planTimer = 0;
  function planPoll() {
    clearTimeout(planTimer);
    planTimer = setTimeout(() => loadPlan(), 3000);
  }

  function onPlanMessage(m) {
    if (m.state === "running") {
      body.dataset.planState = "running";
      $("plan-run").disabled = true; $("plan-cancel").disabled = S.role !== "owner";
      setProgress($("plan-progress"), m.progress || 0, "planning… " + Math.round(100 * (m.progress || 0)) + "%");
      body.dataset.planProgress = String(m.progress || 0);
      return;
    }
    loadPlan();
  }

  async function loadPlan() {
    let rec;
    try {
      rec = await api("GET", "/api/sessions/" + encodeURIComponent(S.id) + "/plan", undefined, S.token);
    } catch (err) { return; }
    if (!rec || rec.state === "none") return;
    if (rec.state === "running") {
      onPlanMessage({ state: "running", progress: rec.progress });
      planPoll();
      return;
    }
    clearTimeout(planTimer);
    planEnded();
    if (rec.state === "cancelled") {
      setProgress($("plan-progress"), 0, "cancelled");
      body.dataset.planState = "cancelled";
      return;
    }
    if (rec.state === "failed") {
      setProgress($("plan-progress"), 0, "failed: " + (rec.message || ""));
      body.dataset.planState = "failed";
      return;
    }
    setProgress($("plan-progress"), 1, "done in " + fmt(rec.seconds, 0) + " s");
    showPlan(rec);
  }

  function showPlan(rec) {
    const rows = rec.results || [];
    const a = rec.advice || {};
    drawPlan(rows, rec);
    const tb = $("plan-table").querySelector("tbody");
    tb.innerHTML = "";
    for (const r of rows) {
      const tr = document.createElement("tr");
      if (a.policy === r.policy && a.streams === r.streams) tr.className = "recommended";
      const cells = [r.policy, fmt(100 * r.budget, 2) + "%", intText(r.streams),
        fmt(r.limit, 2) + (r.normal_limit > 0 ? " (normal model " + fmt(r.normal_limit, 2) + ": ARL0 " + intText(r.normal_arl0) + " here)" : ""),
        r.arl0 > 0 ? intText(r.arl0) + " ± " + intText(r.arl0_se) + " frames" : "–",
        r.add > 0 ? fmt(r.add, 2) + " ± " + fmt(r.add_se, 2) : "none counted"];
      for (const c of cells) { const td = document.createElement("td"); td.textContent = c; tr.appendChild(td); }
      tb.appendChild(tr);
    }
    $("plan-table").hidden = rows.length === 0;
    $("plan-advice").textContent = a.text || "";
    const q = rec.request || {};
    $("plan-note").textContent = rec.grid_w + " × " + rec.grid_h + " streams; change: " + rec.changed_streams +
      " streams shifted by " + q.shift + "; one false alarm per " + intText(q.arl0) + " frames; model: " + rec.model + ". " + (rec.note || "");
    $("plan-model-note").textContent = rec.model_note || "";
    body.dataset.planState = "done";
    body.dataset.planModel = rec.model || "";
    if (a.streams) body.dataset.planRecommended = String(a.streams); else delete body.dataset.planRecommended;
    body.dataset.planMet = String(!!a.met);
  }

  // drawPlan draws delay against budget, one line per policy with ±1 s.e.
  // bars; full and oracle do not depend on the budget and are drawn across.
  function drawPlan(rows, rec) {
    const out = $("plan-plot");
    out.innerHTML = "";
    const ok = rows.filter((r) => r.add > 0);
    if (ok.length === 0) { out.textContent = "No delay to draw."; return; }
    const W = 640, H = 300, ml = 52, mr = 120, mt = 12, mb = 40;
    const xs = [...new Set(ok.map((r) => r.budget))].sort((p, q) => p - q);
    const logX = xs.length > 1;
    const lo = Math.min(...ok.map((r) => Math.max(r.add - r.add_se, r.add / 2, 0.5)));
    const hi = Math.max(...ok.map((r) => r.add + r.add_se), (rec.request && rec.request.target_delay) || 0);
    const ly = (v) => Math.log10(Math.max(v, 1e-9));
    const y0 = Math.floor(ly(lo) * 2) / 2, y1 = Math.ceil(ly(hi * 1.05) * 2) / 2 || 1;
    const xT = (b) => logX ? Math.log10(b) : b;
    const xa = xT(xs[0]), xb = xs.length > 1 ? xT(xs[xs.length - 1]) : xa + 1;
    const pad = 16; // keep the end points off the axes
    const X = (b) => xs.length > 1 ? ml + pad + (xT(b) - xa) / (xb - xa) * (W - ml - mr - 2 * pad) : ml + (W - ml - mr) / 2;
    const Y = (v) => mt + (1 - (ly(v) - y0) / Math.max(y1 - y0, 1e-9)) * (H - mt - mb);
    const NS = "http://www.w3.org/2000/svg";
    const el = (name, attrs, text) => {
      const e = document.createElementNS(NS, name);
      for (const k in attrs) e.setAttribute(k, attrs[k]);
      if (text !== undefined) e.textContent = text;
      return e;
    };
    const svg = el("svg", { viewBox: "0 0 " + W + " " + H, role: "img", "aria-label": "average delay against budget" });
    svg.appendChild(el("line", { x1: ml, y1: H - mb, x2: W - mr, y2: H - mb, stroke: "#666" }));
    svg.appendChild(el("line", { x1: ml, y1: mt, x2: ml, y2: H - mb, stroke: "#666" }));
    for (let e = Math.ceil(y0); e <= y1; e++) {
      for (const m of [1, 2, 5]) {
        const v = m * Math.pow(10, e);
        if (ly(v) < y0 - 1e-9 || ly(v) > y1 + 1e-9) continue;
        svg.appendChild(el("line", { x1: ml, y1: Y(v), x2: W - mr, y2: Y(v), stroke: "#eee" }));
        svg.appendChild(el("text", { x: ml - 4, y: Y(v) + 4, "font-size": 11, "text-anchor": "end" }, String(v)));
      }
    }
    for (const b of xs) svg.appendChild(el("text", { x: X(b), y: H - mb + 14, "font-size": 11, "text-anchor": "middle" }, fmt(100 * b, b < 0.01 ? 2 : 1) + "%"));
    svg.appendChild(el("text", { x: (ml + W - mr) / 2, y: H - 6, "font-size": 12, "text-anchor": "middle" }, "pixels read per frame (budget)"));
    svg.appendChild(el("text", { x: 12, y: (mt + H - mb) / 2, "font-size": 12, "text-anchor": "middle",
      transform: "rotate(-90 12 " + (mt + H - mb) / 2 + ")" }, "average delay, frames"));
    const target = rec.request && rec.request.target_delay;
    if (target > 0 && ly(target) >= y0 && ly(target) <= y1) {
      svg.appendChild(el("line", { x1: ml, y1: Y(target), x2: W - mr, y2: Y(target), stroke: "#2f7d4f", "stroke-dasharray": "2 3" }));
      svg.appendChild(el("text", { x: ml + 6, y: Y(target) - 4, "font-size": 11, fill: "#2f7d4f" }, "longest accepted delay: " + target));
    }
    const pols = [...new Set(ok.map((r) => r.policy))];
    let points = 0, legendY = mt + 10;
    for (const p of pols) {
      const pr = ok.filter((r) => r.policy === p).sort((u, v) => u.budget - v.budget);
      const col = PLAN_COLORS[p] || "#444";
      const g = el("g", { "data-policy": p });
      if (p === "full" || p === "oracle") {
        const r = pr[0];
        g.appendChild(el("line", { x1: ml, y1: Y(r.add), x2: W - mr, y2: Y(r.add), stroke: col, "stroke-dasharray": "6 4" }));
        points++;
      } else {
        g.appendChild(el("polyline", { fill: "none", stroke: col, "stroke-width": 1.6, points: pr.map((r) => X(r.budget) + "," + Y(r.add)).join(" ") }));
        for (const r of pr) {
          const x = X(r.budget), ya = Y(Math.max(r.add - r.add_se, 1e-9)), yb = Y(r.add + r.add_se);
          g.appendChild(el("line", { x1: x, y1: ya, x2: x, y2: yb, stroke: col }));
          g.appendChild(el("line", { x1: x - 4, y1: ya, x2: x + 4, y2: ya, stroke: col }));
          g.appendChild(el("line", { x1: x - 4, y1: yb, x2: x + 4, y2: yb, stroke: col }));
          g.appendChild(el("circle", { cx: x, cy: Y(r.add), r: 3, fill: col, class: "pt" }));
          points++;
        }
      }
      g.appendChild(el("line", { x1: W - mr + 8, y1: legendY, x2: W - mr + 26, y2: legendY, stroke: col, "stroke-width": 2,
        "stroke-dasharray": p === "full" || p === "oracle" ? "6 4" : "" }));
      g.appendChild(el("text", { x: W - mr + 30, y: legendY + 4, "font-size": 11 }, p));
      legendY += 16;
      svg.appendChild(g);
    }
    out.appendChild(svg);
    body.dataset.planPoints = String(points);
  }

  // ---------- share and snapshot ----------

  function wireShare() {
    $("share").addEventListener("click", async () => {
      let u = S.shareURL || absURL((loadStore()[S.id] || {}).share_url);
      if (!u) {
        try {
          const st = await api("GET", "/api/sessions/" + encodeURIComponent(S.id), undefined, S.token);
          u = absURL(st.share_url);
        } catch (e) { showError("Could not get the share link: " + e.message); return; }
      }
      if (!u) { showError("The server did not give a share link."); return; }
      $("share-url").value = u;
      $("share-box").hidden = false;
      body.dataset.shareUrl = u;
      $("share-url").select();
    });
    $("share-copy").addEventListener("click", () => {
      const u = $("share-url").value;
      if (navigator.clipboard) navigator.clipboard.writeText(u).catch(() => {});
      $("share-url").select();
    });
  }

  // snapshot saves the frame with the layers now shown, regions outlined, as a
  // PNG drawn in the page at a whole-number scale.
  function snapshot() {
    if (!S.W || !S.H) return;
    const f = Math.max(1, Math.min(16, Math.floor(1024 / Math.max(S.W, S.H))));
    const scale = Math.max(S.W, S.H) > 2048 ? 2048 / Math.max(S.W, S.H) : f;
    const c = document.createElement("canvas");
    c.width = Math.round(S.W * scale); c.height = Math.round(S.H * scale) + 22;
    const ctx = c.getContext("2d");
    drawScene(ctx, c.width, c.height - 22, scale, 0, 0, Math.max(1, scale / 4));
    ctx.setTransform(1, 0, 0, 1, 0, 0);
    ctx.fillStyle = "#fff"; ctx.fillRect(0, c.height - 22, c.width, 22);
    ctx.fillStyle = "#22262b"; ctx.font = "12px DejaVu Sans, sans-serif"; ctx.textBaseline = "middle";
    const fr = S.cur ? S.cur.frame : -1;
    ctx.fillText((S.name || S.id) + " · frame " + fr + " · " + (STATE_WORDS[body.dataset.state] || "") +
      (S.cur ? " · statistic " + fmt(S.cur.g) + " / limit " + fmt(S.cur.limit) : ""), 6, c.height - 11);
    c.toBlob((blob) => {
      if (!blob) { showError("Could not make the picture."); return; }
      const a = document.createElement("a");
      a.href = URL.createObjectURL(blob);
      a.download = "sparsewatch-" + S.id + "-frame" + fr + ".png";
      body.dataset.snapshot = String(blob.size);
      document.body.appendChild(a); a.click(); a.remove();
      setTimeout(() => URL.revokeObjectURL(a.href), 5000);
    }, "image/png");
  }

  // Hooks for tests and for the curious: read-only views of the page state.
  window.sparsewatch = {
    toCanvas, chartX: (f) => chartX(f), state: S,
    // decode reads one binary frame update (bytes) as the page does.
    // paintMask decodes and paints one frame update's mask, as live updates are.
    paintMask: (bytes) => { const u = decodeFrame(new DataView(new Uint8Array(bytes).buffer)); maskLayer(u); return u.cells; },
    decode: (bytes) => {
      const u = decodeFrame(new DataView(new Uint8Array(bytes).buffer));
      const cells = [];
      forEachCell(u, (c) => cells.push(c));
      return { state: u.state, scale: u.scale, frame: u.frame, g: u.g, limit: u.limit, mw: u.mw, mh: u.mh, cells, regions: u.regions };
    },
    regionColor: COLORS.region, maskColor: COLORS.mask,
  };

  start();
})();
