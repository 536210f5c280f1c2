// The live lot page: takes each snapshot from the station's server-sent events and draws it.
// Text from the datalog (part ids, alarm messages, fault texts) is only ever set as text,
// never as HTML. The page sends GET requests only, except one: the answer to a lot-control
// pause (POST answer), which the station takes only with the bench-control token. The token
// comes in this page's address fragment (#control=..., printed at the station's terminal),
// is kept in this tab's sessionStorage and sent in the X-Control-Token header.
"use strict";

const $ = (id) => document.getElementById(id);

function el(tag, attrs, ...children) {
  const node = document.createElement(tag);
  for (const [key, value] of Object.entries(attrs || {})) {
    if (key === "class") node.className = value;
    else node.setAttribute(key, value);
  }
  for (const child of children) {
    node.append(child instanceof Node ? child : document.createTextNode(child == null ? "" : String(child)));
  }
  return node;
}

function setText(id, text) { $(id).textContent = text == null ? "-" : String(text); }

function pct(share) { return share == null ? "-" : (100 * share).toFixed(1) + " %"; }

function duration(seconds) {
  if (seconds == null) return "-";
  const s = Math.max(0, Math.round(seconds));
  const h = Math.floor(s / 3600), m = Math.floor((s % 3600) / 60), r = s % 60;
  return (h ? h + " h " : "") + String(m).padStart(h ? 2 : 1, "0") + " min " + String(r).padStart(2, "0") + " s";
}

function clock(t, zone = " UTC") {
  if (t == null) return "";
  return new Date(t * 1000).toISOString().slice(11, 19) + zone;
}

function fill(id, rows) { $(id).replaceChildren(...rows); }

function drawState(state, link) {
  const band = $("state-band");
  band.dataset.state = link === "lost" ? "lost" : state.key;
  setText("state-label", link === "lost" ? "NO CONNECTION" : state.label);
  setText("state-detail", link === "lost"
    ? "the page lost the station (the process ended, or the network); last known: " + state.label
    : state.detail);
}

function drawLot(s) {
  const lot = s.lot || {}, p = s.progress || {};
  setText("lot-id", lot.lot_id);
  setText("product", lot.product);
  setText("station", (lot.station || "-") + " / " + (lot.operator || "-"));
  setText("elapsed", duration(p.elapsed_s));
  setText("remaining", p.ended ? "lot ended" : (p.remaining_s == null ? "not known yet" : duration(p.remaining_s)));
  setText("pph", p.parts_per_hour == null ? "-" : Math.round(p.parts_per_hour));
  setText("progress-of", p.expected ? p.parts + " / " + p.expected : (p.parts == null ? "-" : p.parts));
  const t = s.totals || {};
  setText("tested", t.tested);
  setText("good", t.good);
  setText("failed", t.failed);
  setText("faults", t.tester_faults);
  setText("yield", pct(t.yield));
  $("tested").dataset.rows = t.tested == null ? "" : String(t.tested);
}

function drawBins(bins) {
  fill("bin-tiles", (bins || []).map((b) => el("div", { class: "tile", "data-pass": String(b.pass), "data-bin": String(b.bin) },
    el("div", { class: "bin-head" }, el("span", {}, "BIN " + b.bin), el("span", { class: "pf" }, b.pass ? "PASS" : "FAIL")),
    el("div", { class: "count", "data-bin-count": String(b.bin), "data-digits": String(String(b.count).length) }, b.count),
    el("div", { class: "name" }, b.name),
    el("div", { class: "share" }, pct(b.share)))));
}

function drawGrades(grades) {
  fill("grade-rows", (grades || []).map((g) => el("tr", { "data-grade": g.grade },
    el("td", {}, g.grade), el("td", { class: "num", "data-grade-count": g.grade }, g.parts), el("td", { class: "num" }, pct(g.share)))));
}

function drawSites(sites) {
  sites = sites || { rows: [] };
  fill("site-rows", sites.rows.map((r) => el("tr", { "data-site": String(r.site) },
    el("td", {}, r.site), el("td", { class: "num", "data-site-tested": String(r.site) }, r.tested),
    el("td", { class: "num" }, r.good), el("td", { class: "num" }, r.failed), el("td", { class: "num" }, r.faults),
    el("td", { class: "num" }, pct(r.yield)),
    el("td", {}, r.differs ? el("span", { class: "flag differs" }, "DIFFERS") : el("span", { class: "flag same" }, "in line")))));
  const note = $("site-test");
  note.textContent = (sites.flagged ? "SITE DIFFERENCE: " : "") + (sites.test || "-");
  note.className = sites.flagged ? "note alert" : "note";
}

function drawFailing(rows) {
  fill("failing-rows", (rows || []).map((r) => el("tr", { class: r.fault ? "fault-row" : "" },
    el("td", {}, r.part_id), el("td", { class: "num" }, r.site), el("td", { class: "num" }, r.hard_bin + "/" + r.soft_bin),
    el("td", { class: "what" }, r.what), el("td", { class: "what" }, clock(r.end_t, "")))));
  if (!rows || !rows.length) fill("failing-rows", [el("tr", {}, el("td", { colspan: "5" }, "no failing part yet"))]);
}

function drawAlarms(alarms, problems) {
  $("alarms").hidden = !(alarms && alarms.length);
  fill("alarm-list", (alarms || []).map((a) => el("li", {},
    el("strong", {}, (a.action ? a.action.toUpperCase() + ": " : "") + a.rule),
    a.site == null ? "" : " (site " + a.site + ")", " - ", a.message,
    a.time == null ? "" : " - " + (typeof a.time === "number" ? clock(a.time) : a.time),
    el("div", { class: "evidence" }, a.evidence && a.evidence.length
      ? "parts: " + a.evidence.map((e) => e.part_id + (e.hard_bin == null ? "" : " (site " + e.site + ", bin " + e.hard_bin + "/" + e.soft_bin + ")")).join(", ")
      : "no parts named"))));
  $("problems").hidden = !(problems && problems.length);
  fill("problem-list", (problems || []).map((p) => el("li", {}, p)));
}

function drawFiles(s) {
  fill("short-hashes", (s.files || []).filter((f) => f.role !== "bench").map((f) => el("div", { class: "kv" },
    el("span", { class: "k" }, f.role + " " + f.source.split("/").pop()),
    el("span", { class: "v hash-short", title: f.sha256 }, "sha256 " + f.sha256.slice(0, 12)))));
  fill("file-rows", (s.files || []).map((f) => el("tr", {},
    el("td", {}, f.role), el("td", {}, f.source), el("td", { class: "hash" }, "sha256 " + f.sha256))));
  const grades = s.limits || [];
  const table = $("limit-table");
  if (!grades.length) { table.replaceChildren(); return; }
  const head = el("tr", {}, el("th", {}, "parameter"), ...grades.map((g) => el("th", {}, "grade " + g.grade + " (bin " + g.hard_bin + ")")));
  const keys = [];
  for (const g of grades) for (const l of g.limits) {
    const key = l.param + (l.region ? " " + l.region : "");
    if (!keys.includes(key)) keys.push(key);
  }
  const range = (l) => l ? (l.low && l.high ? l.low + " .. " + l.high : l.low ? ">= " + l.low : "<= " + l.high) : "";
  const rows = keys.map((key) => el("tr", {}, el("td", {}, key), ...grades.map((g) =>
    el("td", {}, range(g.limits.find((l) => l.param + (l.region ? " " + l.region : "") === key))))));
  table.replaceChildren(el("thead", {}, head), el("tbody", {}, ...rows));
  const safe = s.safe_state || [];
  if (safe.length) fill("safe-lines", safe.map((line) => el("li", {}, line)));
}

const CONTROL_KEY = "station-control-token";

function controlToken() {
  const match = /(?:^#|&)control=([^&]+)/.exec(window.location.hash);
  if (match) {
    sessionStorage.setItem(CONTROL_KEY, decodeURIComponent(match[1]));
    history.replaceState(null, "", window.location.pathname + window.location.search);   // off the screen
  }
  return sessionStorage.getItem(CONTROL_KEY);
}

let answering = null;   // the pause id this page has sent an answer for
let answerNote = "";

function drawPause(s) {
  const pause = s.pause, token = controlToken();
  $("pause").hidden = !(s.paused && pause);
  $("mode").textContent = token ? "bench control: this page can answer a pause" : "read-only page";
  if (!(s.paused && pause)) { answering = null; return; }
  setText("pause-question", pause.rule + (pause.site == null ? "" : " (site " + pause.site + ")") + ": " + pause.message);
  if (!token) {
    fill("pause-buttons", []);
    setText("pause-note", "answer at the station's terminal (or open the control address printed there)");
    return;
  }
  const labels = { continue: "CONTINUE", skip: "SKIP SITE " + pause.site, stop: "STOP THE LOT" };
  fill("pause-buttons", pause.choices.map((choice) => {
    const button = el("button", { type: "button", "data-choice": choice, class: "choice-" + choice }, labels[choice] || choice);
    button.disabled = answering === pause.id;
    button.addEventListener("click", () => answer(pause.id, choice, token));
    return button;
  }));
  setText("pause-note", answering === pause.id ? answerNote : "the first answer wins, here or at the terminal");
}

async function answer(pauseId, choice, token) {
  answering = pauseId;
  answerNote = "sending " + choice + " ...";
  if (last) drawPause(last);
  let text;
  try {
    const response = await fetch("answer", {
      method: "POST", headers: { "Content-Type": "application/json", "X-Control-Token": token },
      body: JSON.stringify({ pause: pauseId, choice: choice }),
    });
    const reply = await response.json();
    text = reply.message;
    if (!reply.answered) answering = null;     // refused but still open (bad token, too early): ask again
  } catch (error) {
    text = "the answer did not reach the station: " + error;
    answering = null;
  }
  answerNote = text;
  if (last) drawPause(last);                   // the buttons again, if the pause is still open
  setText("pause-note", text);
  setText("answer-reply", "this page's answer: " + text);   // stays after the pause ends
  $("decisions").hidden = false;
}

function drawDecisions(decisions) {
  $("decisions").hidden = !((decisions && decisions.length) || $("answer-reply").textContent);
  fill("decision-list", (decisions || []).map((d) => el("li", { "data-source": d.source || "" },
    el("strong", {}, String(d.choice).toUpperCase()), " (" + (d.source || "terminal") + ", " + d.time + ") - ",
    d.rule + (d.site == null ? "" : ", site " + d.site))));
}

let last = null;
function draw(s, link) {
  last = s;
  drawState(s.state || { key: "waiting", label: "WAITING", detail: "" }, link);
  if (s.lot) {
    drawLot(s); drawBins(s.hard_bins); drawGrades(s.grades); drawSites(s.sites);
    drawFailing(s.last_failing); drawFiles(s);
  }
  drawAlarms(s.alarms, s.problems);
  drawPause(s);
  drawDecisions(s.decisions);
  setText("folder", s.folder || "-");
  setText("updated", s.generated_t ? "updated " + clock(s.generated_t) : "no data yet");
  document.body.dataset.generated = s.generated_t ? String(s.generated_t) : "";
}

function setLink(state) {
  const link = $("link");
  link.dataset.link = state;
  link.textContent = { live: "LIVE", lost: "CONNECTION LOST", connecting: "CONNECTING" }[state];
  if (last) drawState(last.state || {}, state);
}

function connect() {
  const events = new EventSource("events");
  events.addEventListener("snapshot", (message) => {
    setLink("live");
    draw(JSON.parse(message.data), "live");
  });
  events.onerror = () => setLink("lost");   // EventSource tries again by itself
  events.onopen = () => setLink("live");
}

document.addEventListener("DOMContentLoaded", connect);
