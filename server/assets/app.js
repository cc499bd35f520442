// Halfwave dashboard. Plain browser JavaScript, no libraries: the daemon serves this file itself.
// The access token lives in sessionStorage (gone when the tab closes) and is sent as a bearer
// header; the event stream, which EventSource cannot give headers, carries it as access_token.
"use strict";

const API = "/api/v1";
const TOKEN_KEY = "halfwave.token";
const state = { events: null, liveRunId: null, spectrumPending: false, spectrumAgain: false };

const $ = (id) => document.getElementById(id);
const token = () => sessionStorage.getItem(TOKEN_KEY) || "";

async function api(path, options = {}) {
  const headers = Object.assign({ Authorization: "Bearer " + token() }, options.headers || {});
  const response = await fetch(API + path, Object.assign({}, options, { headers }));
  const type = response.headers.get("content-type") || "";
  const body = type.includes("json") ? await response.json() : await response.text();
  if (!response.ok) {
    const error = new Error(body && body.detail ? body.detail : "HTTP " + response.status);
    error.problem = body;
    error.status = response.status;
    throw error;
  }
  return body;
}

// Fetches an SVG with the bearer header and shows it in an <img> through a blob URL.
async function showSvg(img, path) {
  try {
    const svg = await api(path);
    const url = URL.createObjectURL(new Blob([svg], { type: "image/svg+xml" }));
    const old = img.dataset.url;
    img.onload = () => { if (old) URL.revokeObjectURL(old); };
    img.dataset.url = url;
    img.src = url;
    img.hidden = false;
    img.dataset.loaded = String(Number(img.dataset.loaded || "0") + 1);
  } catch (e) {
    img.hidden = true;
  }
}

function cell(row, text, cls) {
  const td = row.insertCell();
  td.textContent = text === undefined || text === null ? "" : String(text);
  if (cls) td.className = cls;
  return td;
}

function when(ms) {
  return ms ? new Date(ms).toISOString().replace("T", " ").slice(0, 19) : "";
}

async function loadBenches() {
  const benches = await api("/benches");
  const body = $("bench-table").tBodies[0];
  body.replaceChildren();
  const select = $("bench-select");
  const chosen = select.value;
  select.replaceChildren();
  showSafety(benches);
  for (const bench of benches) {
    const row = body.insertRow();
    cell(row, bench.name);
    cell(row, safetyWords[bench.safety_state] || bench.safety_state, "safety-" + bench.safety_state);
    cell(row, bench.active_run_id ?? "idle");
    cell(row, (bench.queued_run_ids || []).join(", ") || "none");
    cell(row, describeInstrument({ identity: bench.source_identity, resource: bench.source_resource }));
    cell(row, describeInstrument({ identity: bench.analyzer_identity, resource: bench.analyzer_resource }));
    const option = new Option(bench.name, bench.name);
    select.add(option);
  }
  if (chosen) select.value = chosen;
}

const safetyWords = {
  clear: "RF off or driven by a run",
  output_unconfirmed: "RF OUTPUT NOT CONFIRMED OFF",
  awaiting_acknowledgement: "RF off; held until acknowledged",
};

// Benches with an RF safety fault get a banner above everything else, with what happened and,
// once the output has been read back off, a button to acknowledge (an operator token is needed).
function showSafety(benches) {
  const banner = $("safety-banner");
  banner.replaceChildren();
  const faulty = benches.filter((b) => b.safety_state && b.safety_state !== "clear");
  banner.hidden = faulty.length === 0;
  for (const bench of faulty) {
    const item = document.createElement("div");
    item.className = "safety-item safety-" + bench.safety_state;
    const fault = bench.safety_fault || {};
    const text = document.createElement("p");
    text.textContent = bench.safety_state === "output_unconfirmed"
      ? `Bench ${bench.name}: the RF output could not be read back off since ${when(fault.since_unix_ms)} UTC. ` +
        `The daemon keeps trying; no run starts. Check the source and its link, or switch it off by hand. Cause: ${fault.cause}`
      : `Bench ${bench.name}: the RF output was read back off at ${when(fault.confirmed_off_at_unix_ms)} UTC after a safety fault. ` +
        `Runs wait until an operator has checked the bench and acknowledges. Cause: ${fault.cause}`;
    item.append(text);
    if (bench.safety_state === "awaiting_acknowledgement") {
      const button = document.createElement("button");
      button.type = "button";
      button.textContent = `acknowledge ${bench.name}`;
      button.dataset.bench = bench.name;
      button.onclick = async () => {
        const note = prompt(`What did you check on bench ${bench.name}? (kept in the audit log)`, "") ?? "";
        try {
          await api(`/benches/${encodeURIComponent(bench.name)}/acknowledge`, {
            method: "POST", headers: { "Content-Type": "application/json" }, body: JSON.stringify({ note }),
          });
        } catch (e) { alert(e.message); }
        refreshAll();
      };
      item.append(button);
    }
    banner.append(item);
  }
}

function describeInstrument(instrument) {
  if (!instrument) return "";
  if (typeof instrument === "string") return instrument;
  const identity = instrument.identity || instrument;
  return [identity.model, identity.serial].filter(Boolean).join(" ") || instrument.resource || "";
}

async function loadRuns() {
  const params = new URLSearchParams({ per_page: "25" });
  if ($("filter-device").value) params.set("device", $("filter-device").value);
  if ($("filter-state").value) params.set("state", $("filter-state").value);
  const page = await api("/runs?" + params);
  const body = $("run-table").tBodies[0];
  body.replaceChildren();
  for (const run of page.runs) {
    const row = body.insertRow();
    row.dataset.runId = run.id;
    cell(row, run.id);
    cell(row, run.device_serial);
    cell(row, run.bench);
    cell(row, run.state, "state-" + run.state);
    cell(row, when(run.created_at_unix_ms));
    cell(row, run.submitted_by);
    const actions = row.insertCell();
    if (run.state === "queued" || run.state === "running") actions.append(actionButton("cancel", run.id));
    if (run.state === "interrupted" || (run.state === "failed" && run.resumable)) actions.append(actionButton("resume", run.id));
    if (run.state === "running" && state.liveRunId === null) watchRun(run.id);
  }
}

function actionButton(action, runId) {
  const button = document.createElement("button");
  button.type = "button";
  button.textContent = action;
  button.onclick = async () => {
    try { await api(`/runs/${runId}/${action}`, { method: "POST" }); } catch (e) { alert(e.message); }
    refreshAll();
  };
  return button;
}

async function loadDevices() {
  const devices = await api("/devices");
  const select = $("device-select");
  const chosen = select.value;
  select.replaceChildren(new Option("choose a device", ""));
  for (const device of devices) select.add(new Option(`${device.serial} (${device.model})`, device.serial));
  if (chosen) { select.value = chosen; }
}

async function loadDeviceHistory() {
  const serial = $("device-select").value;
  const body = $("calibration-table").tBodies[0];
  body.replaceChildren();
  if (!serial) { $("vpi-plot").hidden = true; $("response-plot").hidden = true; return; }
  const history = await api(`/devices/${encodeURIComponent(serial)}/calibrations`);
  for (const calibration of history) {
    const row = body.insertRow();
    cell(row, calibration.run_id);
    cell(row, when(calibration.finished_at_unix_ms));
    cell(row, calibration.points.length);
    const first = calibration.points[0];
    cell(row, first ? `${first.v_pi_volts.toFixed(3)} ± ${first.v_pi_uncertainty_volts.toFixed(3)}` : "");
  }
  if (history.length > 0) {
    showSvg($("vpi-plot"), `/devices/${encodeURIComponent(serial)}/plots/v-pi.svg`);
    showSvg($("response-plot"), `/devices/${encodeURIComponent(serial)}/plots/response.svg`);
  }
}

function watchRun(runId) {
  state.liveRunId = runId;
  $("live-summary").textContent = `Run ${runId}`;
}

function setProgress(done, total) {
  const percent = total > 0 ? Math.min(100, (100 * done) / total) : 0;
  $("progress-bar").style.width = percent.toFixed(1) + "%";
  $("progress-bar").dataset.percent = percent.toFixed(1);
  $("progress-text").textContent = `${done} of ${total} points`;
}

// One spectrum request at a time; a point that arrives meanwhile asks for one more.
async function refreshSpectrum(runId) {
  if (state.spectrumPending) { state.spectrumAgain = true; return; }
  state.spectrumPending = true;
  await showSvg($("live-spectrum"), `/runs/${runId}/spectrum.svg`);
  state.spectrumPending = false;
  if (state.spectrumAgain) { state.spectrumAgain = false; refreshSpectrum(runId); }
}

function connectEvents() {
  if (state.events) state.events.close();
  if (!token()) return;
  const source = new EventSource(`${API}/events?access_token=${encodeURIComponent(token())}`);
  state.events = source;
  source.onmessage = (message) => {
    let event;
    try { event = JSON.parse(message.data); } catch (e) { return; }
    switch (event.event) {
      case "started":
        watchRun(event.run_id);
        setProgress(event.already_measured, event.total_points);
        loadRuns().catch(() => {});
        break;
      case "point":
        if (state.liveRunId !== event.run_id) watchRun(event.run_id);
        setProgress(event.completed_points, event.total_points);
        $("live-summary").textContent =
          `Run ${event.run_id}: ${(event.frequency_hz / 1e9).toFixed(3)} GHz, ` +
          `${event.generator_level_dbm.toFixed(1)} dBm, beta = ${event.modulation_index.toFixed(3)}`;
        refreshSpectrum(event.run_id);
        break;
      case "frequency":
        if (event.v_pi_volts !== null && event.v_pi_volts !== undefined) {
          $("progress-text").textContent += ` · V_pi at ${(event.frequency_hz / 1e9).toFixed(3)} GHz = ${event.v_pi_volts.toFixed(3)} V`;
        }
        break;
      case "response": {
        const at = (hz) => (hz === null || hz === undefined ? "not reached" : `${(hz / 1e9).toFixed(2)} GHz`);
        $("progress-text").textContent += ` · response: 3 dB ${at(event.f_3db_hz)}, 6 dB ${at(event.f_6db_hz)}`;
        break;
      }
      case "finished":
        $("live-summary").textContent = `Run ${event.run_id} ${event.state}` + (event.cause ? `: ${event.cause}` : "");
        state.liveRunId = null;
        refreshAll();
        break;
      case "bench_safety":
        loadBenches().catch(() => {});
        break;
      case "queued":
        loadRuns().catch(() => {});
        loadBenches().catch(() => {});
        break;
    }
  };
}

function planFromForm(form) {
  const value = (name) => form.elements[name].value.trim();
  const number = (name) => {
    const input = form.elements[name];
    const raw = input.value.trim();
    if (raw === "") return null;
    const scale = Number(input.dataset.scale || "1");
    return Number(raw) * scale;
  };
  return {
    device: { serial: value("device.serial"), model: value("device.model"),
              rf_input_limit_dbm: number("device.rf_input_limit_dbm"), wavelength_nm: number("device.wavelength_nm") },
    bench: value("bench"),
    chain: { kind: "flat_loss", loss_db: number("chain.loss_db") },
    frequencies: { kind: "linear", start_hz: number("frequencies.start_hz"), stop_hz: number("frequencies.stop_hz"),
                   count: number("frequencies.count") },
    levels: { kind: "ramp", start_dbm: number("levels.start_dbm"), stop_dbm: number("levels.stop_dbm"), step_db: number("levels.step_db") },
    note: value("note"),
  };
}

function clearFieldErrors(form) {
  for (const el of form.querySelectorAll(".field-error")) el.remove();
  for (const el of form.querySelectorAll(".invalid")) el.classList.remove("invalid");
}

async function submitRun(event) {
  event.preventDefault();
  const form = event.target;
  const result = $("submit-result");
  clearFieldErrors(form);
  result.className = "";
  result.textContent = "Submitting…";
  try {
    const created = await api("/runs", { method: "POST", headers: { "Content-Type": "application/json" },
                                         body: JSON.stringify(planFromForm(form)) });
    result.textContent = `Queued as run ${created.run_id}.`;
    watchRun(created.run_id);
    setProgress(0, created.total_points || 0);
    refreshAll();
  } catch (e) {
    result.className = "error";
    result.textContent = e.problem && e.problem.title ? `${e.problem.title}: ${e.problem.detail}` : e.message;
    for (const fieldError of (e.problem && e.problem.errors) || []) {
      const input = form.elements[fieldError.field] || form.elements[fieldError.field.replace(/\[.*$/, "")];
      if (!input) continue;
      input.classList.add("invalid");
      const note = document.createElement("span");
      note.className = "field-error";
      note.textContent = fieldError.message;
      input.after(note);
    }
  }
}

async function refreshAll() {
  if (!token()) return;
  const results = await Promise.allSettled([loadBenches(), loadRuns(), loadDevices()]);
  const unauthorized = results.find((r) => r.status === "rejected" && r.reason.status === 401);
  $("token-state").textContent = unauthorized ? "token refused" : "token set";
  if ($("device-select").value) loadDeviceHistory().catch(() => {});
}

function init() {
  $("token-form").addEventListener("submit", (event) => {
    event.preventDefault();
    const value = $("token-input").value.trim();
    if (value) sessionStorage.setItem(TOKEN_KEY, value);
    $("token-input").value = "";
    connectEvents();
    refreshAll();
  });
  $("run-form").addEventListener("submit", submitRun);
  $("refresh-runs").addEventListener("click", () => loadRuns().catch(() => {}));
  $("device-select").addEventListener("change", () => loadDeviceHistory().catch(() => {}));
  if (token()) { $("token-state").textContent = "token set"; connectEvents(); refreshAll(); }
}

init();
