// Halfwave dashboard. Plain browser JavaScript, no libraries: the daemon serves this file itself.
// The access token lives in sessionStorage (gone when the tab closes) and is sent as a bearer
// header; the event stream, which EventSource cannot give headers, is opened with a one-time
// ticket asked for with that header (POST /events/ticket), so the token never appears in a URL.
// The page's content-security policy allows no inline styles: sizes are set through the DOM
// (element.style, <progress>.value), never with style attributes in markup.
"use strict";

const API = "/api/v1";
const TOKEN_KEY = "halfwave.token";
const state = { events: null, eventsRetry: null, liveRunId: null, spectrumPending: false, spectrumAgain: false, shownRun: null };

const $ = (id) => document.getElementById(id);
const token = () => sessionStorage.getItem(TOKEN_KEY) || "";

// Calls the API; with `raw`, returns { body, headers } instead of the body alone.
async function api(path, options = {}, raw = false) {
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
  return raw ? { body, headers: response.headers } : body;
}

const postJson = (path, value) =>
  api(path, { method: "POST", headers: { "Content-Type": "application/json" }, body: JSON.stringify(value) });

// Fetches an SVG with the bearer header and shows it in an <img> through a blob URL; returns the
// response headers (device plots name the run they show there), or null when it failed.
async function showSvg(img, path) {
  try {
    const { body, headers } = await api(path, {}, true);
    const url = URL.createObjectURL(new Blob([body], { type: "image/svg+xml" }));
    const old = img.dataset.url;
    img.onload = () => { if (old) URL.revokeObjectURL(old); };
    img.dataset.url = url;
    img.src = url;
    img.hidden = false;
    img.dataset.loaded = String(Number(img.dataset.loaded || "0") + 1);
    return headers;
  } catch (e) {
    img.hidden = true;
    return null;
  }
}

// "run 12, the pinned reference calibration" from a device plot's headers.
function describePlotRun(headers) {
  if (!headers) return "";
  const id = headers.get("Halfwave-Run-Id");
  const why = {
    pinned: "the pinned reference calibration",
    newest_covering: "the newest completed run covering every calibrated frequency (none pinned)",
    newest: "the newest completed run (none pinned, none covers every calibrated frequency)",
    requested: headers.get("Halfwave-Run-Pinned") === "true" ? "the pinned reference calibration" : "not pinned",
  }[headers.get("Halfwave-Run-Selection")] || "";
  return id ? `Plots show run ${id}${why ? ", " + why : ""}.` : "";
}

function cell(row, text, cls) {
  const td = row.insertCell();
  td.textContent = text === undefined || text === null ? "" : String(text);
  if (cls) td.className = cls;
  return td;
}

function runLink(runId) {
  const a = document.createElement("a");
  a.href = `#run/${runId}`;
  a.textContent = String(runId);
  a.className = "run-link";
  return a;
}

function when(ms) {
  return ms ? new Date(ms).toISOString().replace("T", " ").slice(0, 19) : "";
}

const ghz = (hz) => Number((hz / 1e9).toPrecision(6)).toString();

// What the engine and the API treat as resumable: an interrupted run, or a failed run whose cause
// was a link fault with its points intact (`resumable`). Cancelled and other failed runs are not.
const isResumable = (run) => run.state === "interrupted" || (run.state === "failed" && run.resumable === true);
const isCancellable = (run) => run.state === "queued" || run.state === "running" || run.state === "interrupted";

// Says why the page is empty: no token, or a token the daemon refused.
function showTokenNotice(kind) {
  const notice = $("token-notice");
  notice.hidden = kind === "ok";
  if (kind === "refused") {
    notice.querySelector("p").replaceChildren(
      "The daemon refused this token (mistyped, revoked, or from another daemon's database), so " +
      "nothing can be shown. Paste a valid one at the top right; `halfwave token list --config FILE` " +
      "on the bench PC names the tokens that exist.");
  }
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

// The chain calibrations a plan may name (newest version of each); the engine's own flat-loss
// rows (made for plans with a flat loss, named with engine::FLAT_LOSS_PREFIX) are not offered.
async function loadChains() {
  const versions = await api("/chain-calibrations");
  const select = $("chain-select");
  const chosen = select.value;
  const names = [...new Set(versions.map((v) => v.name))].filter((n) => !n.startsWith("flat-loss-"));
  select.replaceChildren(new Option("flat loss (a quick check)", ""));
  for (const name of names) select.add(new Option(name, name));
  if (chosen && names.includes(chosen)) select.value = chosen;
  showChainChoice();
}

// The flat loss applies only when no stored chain is chosen.
function showChainChoice() {
  const form = $("run-form");
  form.elements["chain.loss_db"].disabled = form.elements["chain"].value !== "";
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
          await postJson(`/benches/${encodeURIComponent(bench.name)}/acknowledge`, { note });
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
    row.insertCell().append(runLink(run.id));
    cell(row, run.device_serial);
    cell(row, run.bench);
    cell(row, run.state + (run.state === "failed" && run.resumable ? " (resumable)" : ""), "state-" + run.state);
    cell(row, when(run.created_at_unix_ms));
    cell(row, run.submitted_by);
    const actions = row.insertCell();
    actions.className = "actions";
    if (isCancellable(run)) actions.append(cancelButton(run.id, actions));
    if (isResumable(run)) actions.append(actionButton("resume", run.id));
    if (run.state === "running" && state.liveRunId === null) watchRun(run.id);
  }
}

function actionButton(action, runId) {
  const button = document.createElement("button");
  button.type = "button";
  button.textContent = action;
  button.dataset.action = action;
  button.onclick = async () => {
    try { await api(`/runs/${runId}/${action}`, { method: "POST" }); } catch (e) { alert(e.message); }
    refreshAll();
  };
  return button;
}

// Cancel asks first, in the page: a run cancelled by a stray click loses its night.
function cancelButton(runId, container) {
  const button = document.createElement("button");
  button.type = "button";
  button.textContent = "cancel";
  button.dataset.action = "cancel";
  button.onclick = () => {
    const ask = document.createElement("span");
    ask.className = "confirm";
    ask.append(`Cancel run ${runId}? Its RF is switched off and it ends (measured points stay). `);
    const yes = document.createElement("button");
    yes.type = "button";
    yes.textContent = `yes, cancel run ${runId}`;
    yes.dataset.action = "confirm-cancel";
    yes.className = "danger";
    yes.onclick = async () => {
      try { await api(`/runs/${runId}/cancel`, { method: "POST" }); } catch (e) { alert(e.message); }
      refreshAll();
    };
    const no = document.createElement("button");
    no.type = "button";
    no.textContent = "no, keep it";
    no.dataset.action = "keep";
    no.className = "quiet-button";
    no.onclick = () => { ask.remove(); button.hidden = false; };
    ask.append(yes, " ", no);
    button.hidden = true;
    container.append(ask);
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

async function pinRun(serial, runId, resultElement) {
  try {
    await postJson(`/devices/${encodeURIComponent(serial)}/pin`, { run_id: runId, note: "pinned from the dashboard" });
    if (resultElement) resultElement.textContent = `Run ${runId} is now the reference calibration of ${serial}.`;
  } catch (e) {
    const text = e.status === 403 ? "Pinning needs an operator token." : e.message;
    if (resultElement) resultElement.textContent = text; else alert(text);
  }
}

async function unpinDevice(serial, resultElement) {
  try {
    await postJson(`/devices/${encodeURIComponent(serial)}/unpin`, { note: "unpinned from the dashboard" });
    if (resultElement) resultElement.textContent = `${serial} has no pinned run now.`;
  } catch (e) {
    const text = e.status === 403 ? "Unpinning needs an operator token." : e.message;
    if (resultElement) resultElement.textContent = text; else alert(text);
  }
}

async function loadDeviceHistory() {
  const serial = $("device-select").value;
  const body = $("calibration-table").tBodies[0];
  body.replaceChildren();
  $("device-plot-note").textContent = "";
  if (!serial) { $("vpi-plot").hidden = true; $("response-plot").hidden = true; return; }
  const history = await api(`/devices/${encodeURIComponent(serial)}/calibrations`);
  for (const calibration of history) {
    const row = body.insertRow();
    row.dataset.runId = calibration.run_id;
    row.insertCell().append(runLink(calibration.run_id));
    cell(row, when(calibration.finished_at_unix_ms));
    cell(row, calibration.points.length);
    const points = calibration.points;
    cell(row, points.length ? `${ghz(points[0].frequency_hz)}–${ghz(points[points.length - 1].frequency_hz)}` : "");
    const first = points[0];
    cell(row, first ? `${first.v_pi_volts.toFixed(3)} ± ${first.v_pi_uncertainty_volts.toFixed(3)}` : "");
    const reference = row.insertCell();
    if (calibration.pinned) {
      row.classList.add("pinned");
      const mark = document.createElement("strong");
      mark.className = "pin-mark";
      mark.textContent = "pinned";
      const unpin = document.createElement("button");
      unpin.type = "button";
      unpin.className = "quiet-button";
      unpin.dataset.action = "unpin";
      unpin.textContent = "unpin";
      unpin.onclick = async () => { await unpinDevice(serial); loadDeviceHistory().catch(() => {}); };
      reference.append(mark, " ", unpin);
    } else {
      const pin = document.createElement("button");
      pin.type = "button";
      pin.className = "quiet-button";
      pin.dataset.action = "pin";
      pin.textContent = "pin";
      pin.onclick = async () => { await pinRun(serial, calibration.run_id); loadDeviceHistory().catch(() => {}); };
      reference.append(pin);
    }
  }
  if (history.length > 0) {
    const headers = await showSvg($("vpi-plot"), `/devices/${encodeURIComponent(serial)}/plots/v-pi.svg`);
    $("device-plot-note").textContent = describePlotRun(headers);
    showSvg($("response-plot"), `/devices/${encodeURIComponent(serial)}/plots/response.svg`);
  } else {
    $("vpi-plot").hidden = true;
    $("response-plot").hidden = true;
    $("device-plot-note").textContent = `${serial} has no completed calibration yet.`;
  }
}

// ---- One run's own view (#run/ID) ----

function downloadBlob(name, type, text) {
  const url = URL.createObjectURL(new Blob([text], { type }));
  const a = document.createElement("a");
  a.href = url;
  a.download = name;
  document.body.append(a);
  a.click();
  a.remove();
  setTimeout(() => URL.revokeObjectURL(url), 10000);
}

function vpiCsv(run) {
  const lines = ["frequency_hz,v_pi_volts,v_pi_uncertainty_volts"];
  for (const r of run.results) lines.push(`${r.frequency_hz},${r.v_pi_volts},${r.v_pi_uncertainty_volts}`);
  return lines.join("\n") + "\n";
}

async function allPoints(runId) {
  const points = [];
  for (let page = 1; ; page++) {
    const list = await api(`/runs/${runId}/points?per_page=1000&page=${page}`);
    points.push(...list.points);
    if (points.length >= list.total || list.points.length === 0) return points;
  }
}

async function exportRun(kind) {
  const run = state.shownRun;
  if (!run) return;
  try {
    if (kind === "vpi-csv") downloadBlob(`run-${run.id}-v-pi.csv`, "text/csv", vpiCsv(run));
    if (kind === "run-json") downloadBlob(`run-${run.id}.json`, "application/json", JSON.stringify(run, null, 2));
    if (kind === "points-json") {
      const points = await allPoints(run.id);
      downloadBlob(`run-${run.id}-points.json`, "application/json", JSON.stringify({ run_id: run.id, points }, null, 2));
    }
  } catch (e) { alert(e.message); }
}

async function showRun(runId) {
  const panel = $("run-panel");
  panel.hidden = false;
  panel.dataset.runId = runId;
  $("run-title").textContent = `Run ${runId}`;
  $("run-pin-result").textContent = "";
  $("compare-table").hidden = true;
  $("compare-note").textContent = "";
  let run;
  try {
    run = await api(`/runs/${runId}`);
  } catch (e) {
    $("run-summary").textContent = e.message;
    state.shownRun = null;
    return;
  }
  state.shownRun = run;
  panel.dataset.state = run.state;
  $("run-title").textContent = `Run ${run.id} · ${run.device_serial} · ${run.state}`;
  $("run-summary").textContent =
    `Bench ${run.bench}, submitted by ${run.submitted_by} at ${when(run.created_at_unix_ms)} UTC` +
    (run.finished_at_unix_ms ? `, ended ${when(run.finished_at_unix_ms)} UTC` : "") +
    `; ${run.measured_points} points measured` + (run.cause ? `. ${run.cause}` : ".") +
    (isResumable(run) ? " It can be resumed." : "");

  const body = $("run-vpi-table").tBodies[0];
  body.replaceChildren();
  for (const r of run.results) {
    const row = body.insertRow();
    cell(row, ghz(r.frequency_hz));
    cell(row, r.v_pi_volts.toFixed(4));
    cell(row, r.v_pi_uncertainty_volts.toFixed(4));
    cell(row, Array.isArray(r.excluded_points) ? r.excluded_points.length : "");
  }
  if (run.results.length === 0) {
    const row = body.insertRow();
    cell(row, "no V_pi yet").colSpan = 4;
  }

  await showPinState(run);
  const serial = encodeURIComponent(run.device_serial);
  const calibration = run.state === "completed" && run.results.length > 0;
  if (calibration) {
    $("run-plot-note").textContent = "";
    showSvg($("run-vpi-plot"), `/devices/${serial}/plots/v-pi.svg?run_id=${run.id}`);
    showSvg($("run-response-plot"), `/devices/${serial}/plots/response.svg?run_id=${run.id}`);
  } else {
    $("run-vpi-plot").hidden = true;
    $("run-response-plot").hidden = true;
    $("run-plot-note").textContent = "V_pi and response plots are drawn for completed runs; the latest spectrum:";
  }
  showSvg($("run-spectrum"), `/runs/${run.id}/spectrum.svg`);
  loadCompareChoices(run).catch(() => {});
}

async function showPinState(run) {
  const pinState = $("run-pin-state");
  const pinButton = $("run-pin");
  const unpinButton = $("run-unpin");
  pinButton.hidden = true;
  unpinButton.hidden = true;
  let pin = null;
  try {
    pin = await api(`/devices/${encodeURIComponent(run.device_serial)}/pin`);
  } catch (e) {
    pinState.textContent = "";
    return;
  }
  const pinnedId = pin.pinned ? pin.pinned.run_id : null;
  if (pinnedId === run.id) {
    pinState.textContent = `Pinned: the reference calibration of ${run.device_serial} (by ${pin.pinned.pinned_by}, ${when(pin.pinned.pinned_at_unix_ms)} UTC). V_pi lookups of this device use it.`;
    pinState.className = "pin-mark";
    unpinButton.hidden = false;
  } else {
    pinState.className = "";
    pinState.textContent = (pinnedId !== null ? `Run ${pinnedId} is the pinned reference calibration of ${run.device_serial}.` :
      `No run of ${run.device_serial} is pinned: lookups use the newest completed run covering each frequency.`);
    if (run.state === "completed" && run.results.length > 0) {
      pinButton.hidden = false;
    } else {
      pinState.textContent += " Only a completed run with V_pi results can be pinned.";
    }
  }
}

async function loadCompareChoices(run) {
  const select = $("compare-select");
  select.replaceChildren();
  const params = new URLSearchParams({ device: run.device_serial, per_page: "100" });
  const page = await api("/runs?" + params);
  for (const other of page.runs) {
    if (other.id === run.id) continue;
    select.add(new Option(`run ${other.id} (${other.state}, ${when(other.created_at_unix_ms).slice(0, 10)})`, String(other.id)));
  }
  if (select.options.length === 0) {
    $("compare-note").textContent = `No other run of ${run.device_serial} to compare with.`;
  }
}

async function compareRuns(event) {
  event.preventDefault();
  const run = state.shownRun;
  const other = $("compare-select").value;
  if (!run || !other) return;
  try {
    const comparison = await api(`/runs/${run.id}/compare/${other}`);
    $("compare-a").textContent = `V\u03C0 run ${run.id} (V)`;
    $("compare-b").textContent = `V\u03C0 run ${other} (V)`;
    const body = $("compare-table").tBodies[0];
    body.replaceChildren();
    const volts = (v) => (v === null || v === undefined ? "—" : v.toFixed(4));
    for (const row of comparison.rows) {
      const tr = body.insertRow();
      cell(tr, ghz(row.frequency_hz));
      cell(tr, volts(row.v_pi_a_volts));
      cell(tr, volts(row.v_pi_b_volts));
      cell(tr, row.difference_percent === null || row.difference_percent === undefined ? "—" :
        (row.difference_percent >= 0 ? "+" : "") + row.difference_percent.toFixed(2));
    }
    $("compare-table").hidden = false;
    $("compare-note").textContent = `Difference of run ${other} from run ${run.id}, per frequency measured by both.`;
  } catch (e) {
    $("compare-note").textContent = e.message;
  }
}

function route() {
  const match = /^#run\/(\d+)$/.exec(location.hash);
  if (match && token()) {
    showRun(Number(match[1]));
    $("run-panel").scrollIntoView({ block: "start" });
  } else {
    $("run-panel").hidden = true;
    state.shownRun = null;
  }
}

// ---- Live progress ----

function watchRun(runId) {
  state.liveRunId = runId;
  $("live-summary").textContent = `Run ${runId}`;
}

function setProgress(done, total) {
  const percent = total > 0 ? Math.min(100, (100 * done) / total) : 0;
  $("progress-bar").value = percent;
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

// Opens the event stream with a fresh one-time ticket. A ticket opens one stream only, so when
// the stream drops (daemon restart, network) the browser's own reconnection would be refused:
// close it and connect again with a new ticket after a pause.
async function connectEvents() {
  if (state.events) state.events.close();
  state.events = null;
  clearTimeout(state.eventsRetry);
  if (!token()) return;
  let ticket;
  try {
    ticket = (await api("/events/ticket", { method: "POST" })).ticket;
  } catch (e) {
    if (e.status !== 401 && e.status !== 403) state.eventsRetry = setTimeout(connectEvents, 5000);
    return;
  }
  const source = new EventSource(`${API}/events?ticket=${encodeURIComponent(ticket)}`);
  state.events = source;
  source.onerror = () => {
    if (state.events !== source) return;
    source.close();
    state.events = null;
    state.eventsRetry = setTimeout(connectEvents, 3000);
  };
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
        // "point N" counts the run's points in measuring order, as the spectrum's title does.
        $("live-summary").textContent =
          `Run ${event.run_id}, point ${event.completed_points}: ${(event.frequency_hz / 1e9).toFixed(3)} GHz, ` +
          `${event.generator_level_dbm.toFixed(1)} dBm, beta = ${event.modulation_index.toFixed(3)}` +
          ((event.warnings || []).includes("index_not_within_one_percent")
            ? " (uncertainty over a third of 1 %: not promised within 1 %)"
            : "");
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

// ---- The submit form ----

// Reads the form into a plan; number fields are checked here first, each message in the field's
// own unit ("Start must be above 0 GHz"), so the daemon sees only numbers.
function planFromForm(form) {
  const errors = [];
  const value = (name) => form.elements[name].value.trim();
  const number = (name) => {
    const input = form.elements[name];
    const label = input.dataset.label || name;
    const unit = input.dataset.unit ? " " + input.dataset.unit : "";
    const raw = input.value.trim();
    if (input.validity && input.validity.badInput) {
      errors.push({ field: name, message: `${label}: what was typed is not a number; enter a number${unit ? " in" + unit : ""}` });
      return undefined;
    }
    if (raw === "") {
      if (input.dataset.optional) return undefined;
      errors.push({ field: name, message: `${label}: enter a value${unit ? " in" + unit : ""}` });
      return undefined;
    }
    const typed = Number(raw);
    if (!Number.isFinite(typed)) {
      errors.push({ field: name, message: `${label}: "${raw}" is not a number` });
      return undefined;
    }
    if (input.dataset.integer && (!Number.isInteger(typed) || typed < 1)) {
      errors.push({ field: name, message: `${label} must be a whole number, 1 or more (not ${raw})` });
      return undefined;
    }
    if (input.dataset.positive && typed <= 0) {
      errors.push({ field: name, message: `${label} must be above 0${unit} (not ${raw}${unit})` });
      return undefined;
    }
    return typed * Number(input.dataset.scale || "1");
  };
  const device = { serial: value("device.serial"), model: value("device.model"),
                   rf_input_limit_dbm: number("device.rf_input_limit_dbm") };
  const wavelength = number("device.wavelength_nm");
  if (wavelength !== undefined) device.wavelength_nm = wavelength;
  const plan = {
    device,
    bench: value("bench"),
    chain: value("chain") !== "" ? { kind: "stored", name: value("chain") }
                                 : { kind: "flat_loss", loss_db: number("chain.loss_db") },
    frequencies: { kind: "linear", start_hz: number("frequencies.start_hz"), stop_hz: number("frequencies.stop_hz"),
                   count: number("frequencies.count") },
    levels: { kind: "ramp", start_dbm: number("levels.start_dbm"), stop_dbm: number("levels.stop_dbm"), step_db: number("levels.step_db") },
    note: value("note"),
  };
  return { plan, errors };
}

// The daemon states frequencies in hertz; a field the user filled in GHz gets them back in GHz
// ("-1000000000 Hz" becomes "-1 GHz").
function inFieldUnit(message, input) {
  if (!input || !input.dataset.scale) return message;
  const scale = Number(input.dataset.scale);
  const unit = input.dataset.unit || "";
  return message.replace(/(-?\d+(?:\.\d+)?(?:[eE][+-]?\d+)?) Hz\b/g,
    (_, hz) => `${Number((Number(hz) / scale).toPrecision(9))} ${unit}`);
}

function clearFieldErrors(form) {
  for (const el of form.querySelectorAll(".field-error")) el.remove();
  for (const el of form.querySelectorAll(".invalid")) el.classList.remove("invalid");
}

function showFieldErrors(form, errors) {
  for (const fieldError of errors) {
    const input = form.elements[fieldError.field] || form.elements[fieldError.field.replace(/\[.*$/, "")];
    if (!input) continue;
    input.classList.add("invalid");
    const note = document.createElement("span");
    note.className = "field-error";
    note.textContent = inFieldUnit(fieldError.message, input);
    input.after(note);
  }
}

async function submitRun(event) {
  event.preventDefault();
  const form = event.target;
  const result = $("submit-result");
  clearFieldErrors(form);
  const { plan, errors } = planFromForm(form);
  if (errors.length > 0) {
    result.className = "error";
    result.textContent = `Not sent: ${errors.length === 1 ? "one field needs" : errors.length + " fields need"} a fix.`;
    showFieldErrors(form, errors);
    return;
  }
  result.className = "";
  result.textContent = "Submitting…";
  try {
    const created = await postJson("/runs", plan);
    result.textContent = `Queued as run ${created.run_id}.`;
    watchRun(created.run_id);
    setProgress(0, created.total_points || 0);
    refreshAll();
  } catch (e) {
    result.className = "error";
    const fields = (e.problem && e.problem.errors) || [];
    const detail = e.problem && e.problem.title ? `${e.problem.title}: ${e.problem.detail}` : e.message;
    // The summary line in the unit of the field it names, when it names one.
    const named = fields.length === 1 ? form.elements[fields[0].field] : null;
    result.textContent = inFieldUnit(detail, named);
    showFieldErrors(form, fields);
  }
}

async function refreshAll() {
  if (!token()) { showTokenNotice("missing"); return; }
  const results = await Promise.allSettled([loadBenches(), loadChains(), loadRuns(), loadDevices()]);
  const unauthorized = results.find((r) => r.status === "rejected" && r.reason.status === 401);
  $("token-state").textContent = unauthorized ? "token refused" : "token set";
  showTokenNotice(unauthorized ? "refused" : "ok");
  if ($("device-select").value) loadDeviceHistory().catch(() => {});
  if (state.shownRun) showRun(state.shownRun.id).catch(() => {});
}

function init() {
  $("token-form").addEventListener("submit", (event) => {
    event.preventDefault();
    const value = $("token-input").value.trim();
    if (value) sessionStorage.setItem(TOKEN_KEY, value);
    $("token-input").value = "";
    connectEvents();
    refreshAll();
    route();
  });
  $("run-form").addEventListener("submit", submitRun);
  $("chain-select").addEventListener("change", showChainChoice);
  $("refresh-runs").addEventListener("click", () => loadRuns().catch(() => {}));
  $("device-select").addEventListener("change", () => loadDeviceHistory().catch(() => {}));
  $("run-close").addEventListener("click", (event) => { event.preventDefault(); location.hash = ""; });
  $("run-pin").addEventListener("click", async () => {
    const run = state.shownRun;
    if (!run) return;
    await pinRun(run.device_serial, run.id, $("run-pin-result"));
    const said = $("run-pin-result").textContent;
    await showRun(run.id);
    $("run-pin-result").textContent = said;
    if ($("device-select").value === run.device_serial) loadDeviceHistory().catch(() => {});
  });
  $("run-unpin").addEventListener("click", async () => {
    const run = state.shownRun;
    if (!run) return;
    await unpinDevice(run.device_serial, $("run-pin-result"));
    const said = $("run-pin-result").textContent;
    await showRun(run.id);
    $("run-pin-result").textContent = said;
    if ($("device-select").value === run.device_serial) loadDeviceHistory().catch(() => {});
  });
  for (const link of document.querySelectorAll("[data-export]")) {
    link.addEventListener("click", (event) => { event.preventDefault(); exportRun(link.dataset.export); });
  }
  $("compare-form").addEventListener("submit", compareRuns);
  window.addEventListener("hashchange", route);
  if (token()) {
    $("token-state").textContent = "token set";
    connectEvents();
    refreshAll();
    route();
  } else {
    showTokenNotice("missing");
  }
}

init();
