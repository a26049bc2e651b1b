// The sodium course: after the SMART launch, read the patient's data from
// the FHIR server with the clinician's token (in this browser only), run
// halite's own computation (cmd/halite-wasm, WebAssembly) over it with the
// draft orders the card carried in its appContext, and draw the course.
// Nothing read here is sent to halite.
import FHIR from "fhirclient";
import {
  Chart, LineController, LineElement, PointElement, LinearScale, Legend, Tooltip,
} from "chart.js";

Chart.register(LineController, LineElement, PointElement, LinearScale, Legend, Tooltip);

// Okabe–Ito colours (safe for the common colour-vision deficiencies); each
// series also differs by marker or dash, so none is told by colour alone.
const colours = {
  laboratory: "#0072B2", "blood gas": "#D55E00", "point of care": "#009E73",
  projection: "#CC79A7", limit24: "#000000", limit48: "#E69F00",
  running: "#56B4E9", draft: "#999999", reviewed: "#CC79A7",
};
const markers = { laboratory: "circle", "blood gas": "triangle", "point of care": "rect" };
const figureNames = [
  ["sodiumLatest", "Latest sodium", "mmol/L"],
  ["riseFromNadir24h", "Rise from the nadir, last 24 h", "mmol/L"],
  ["riseFromNadir48h", "Rise from the nadir, last 48 h", "mmol/L"],
  ["fallFromPeak24h", "Fall from the peak, last 24 h", "mmol/L"],
  ["limit24h", "Limit, any 24 h", "mmol/L"],
  ["limit48h", "Limit, any 48 h", "mmol/L"],
  ["tbwLitres", "Total body water", "L"],
  ["infusateNaKmmolPerL", "Infusate Na + K", "mmol/L"],
  ["deltaPerLitre", "Change per litre of this infusate", "mmol/L"],
  ["volume24hLitres", "Volume in the next 24 h", "L"],
  ["projectedChange24h", "Projected change, next 24 h", "mmol/L"],
  ["projectedTotal24h", "Achieved plus projected, 24 h", "mmol/L"],
  ["maxVolume24hLitres", "Most volume within the limit, 24 h", "L"],
  ["maxRateMlPerHour", "Highest rate within the limit", "mL/h"],
];

const $ = (id) => document.getElementById(id);
const state = { history: 72 };

function setStatus(text) { $("status").textContent = text; }

function hoursFrom(at, t) { return (Date.parse(t) - Date.parse(at)) / 3600000; }

function fmtTime(t) {
  return new Date(t).toLocaleString(undefined, { dateStyle: "medium", timeStyle: "short" });
}

async function readAll(client, query) {
  const out = await client.request(query, { pageLimit: 0, flat: true });
  return (Array.isArray(out) ? out : [out]).filter((r) => r && r.resourceType && r.resourceType !== "OperationOutcome");
}

async function loadHalite() {
  const go = new Go(); // from wasm_exec.js
  const { instance } = await WebAssembly.instantiateStreaming(fetch("halite.wasm"), go.importObject);
  go.run(instance); // registers haliteCourse and keeps running
  if (typeof globalThis.haliteCourse !== "function") throw new Error(globalThis.haliteError || "the computation did not start");
}

function compute(rate) {
  const req = { ...state.request, historyHours: state.history };
  if (rate !== undefined) req.rateMlPerHour = rate;
  const out = JSON.parse(globalThis.haliteCourse(JSON.stringify(req)));
  if (out.error) throw new Error(out.error);
  return out;
}

function render(course) {
  const at = course.at;
  const datasets = [];
  for (const origin of ["laboratory", "blood gas", "point of care"]) {
    const pts = course.sodium.filter((p) => (p.origin || "laboratory") === origin);
    if (!pts.length) continue;
    datasets.push({
      label: `Sodium, ${origin}`, data: pts.map((p) => ({ x: hoursFrom(at, p.at), y: p.value, t: p.at })),
      borderColor: colours[origin], backgroundColor: colours[origin], pointStyle: markers[origin],
      pointRadius: 6, showLine: true, borderWidth: 2, yAxisID: "y",
    });
  }
  if (course.reference) {
    const r = course.reference;
    datasets.push({
      label: `${course.falling ? "Peak" : "Nadir"} the limits are measured from (${r.value} mmol/L${r.origin ? "" : ", at the 24-h window's start"})`,
      data: [{ x: hoursFrom(at, r.at), y: r.value, t: r.at }],
      borderColor: colours.limit24, backgroundColor: "#FFFFFF", pointStyle: "star", pointRadius: 10, borderWidth: 2, showLine: false, yAxisID: "y",
    });
  }
  if (course.projection.length) {
    datasets.push({
      label: "Projection of the order under review", data: course.projection.map((p) => ({ x: hoursFrom(at, p.at), y: p.value, t: p.at })),
      borderColor: colours.projection, backgroundColor: colours.projection, borderDash: [8, 4], pointStyle: "crossRot", pointRadius: 6, borderWidth: 3, yAxisID: "y",
    });
  }
  for (const l of course.limits) {
    const key = l.hours === 24 ? "limit24" : "limit48";
    datasets.push({
      label: `${l.hours}-h limit from the ${course.falling ? "peak" : "nadir"} (${l.value} mmol/L)`,
      data: [{ x: hoursFrom(at, l.from), y: l.value, t: l.from }, { x: hoursFrom(at, l.until), y: l.value, t: l.until }],
      borderColor: colours[key], backgroundColor: colours[key], borderDash: l.hours === 24 ? [14, 6] : [2, 4], pointRadius: 0, borderWidth: 2, yAxisID: "y",
    });
  }
  course.orders.forEach((o, i) => {
    datasets.push({
      label: `${o.kind === "reviewed" ? "Under review" : o.kind === "draft" ? "Drafted" : "Running"}: ${o.label}${o.rateMlPerHour ? ` at ${o.rateMlPerHour} mL/h` : ""}`,
      data: [{ x: hoursFrom(at, o.start), y: i + 1, t: o.start }, { x: hoursFrom(at, o.end), y: i + 1, t: o.end }],
      borderColor: colours[o.kind], backgroundColor: colours[o.kind], borderWidth: 10, pointRadius: 0,
      borderDash: o.kind === "draft" ? [6, 3] : o.kind === "running" ? [2, 2] : [], yAxisID: "orders",
    });
  });
  const values = course.sodium.map((p) => p.value).concat(course.projection.map((p) => p.value), course.limits.map((l) => l.value));
  if (!values.length) values.push(135, 145); // no value to draw: an axis around the normal range
  const config = {
    type: "line",
    data: { datasets },
    options: {
      animation: false, maintainAspectRatio: false, parsing: true,
      scales: {
        x: { type: "linear", min: -state.history, max: 24, title: { display: true, text: "hours from now" }, ticks: { stepSize: 12, callback: (v) => `${v} h` } },
        y: { type: "linear", stack: "course", stackWeight: 4, min: Math.floor(Math.min(...values) - 2), max: Math.ceil(Math.max(...values) + 2), title: { display: true, text: "sodium (mmol/L)" } },
        orders: { type: "linear", stack: "course", stackWeight: 1, offset: true, min: 0, max: course.orders.length + 1, ticks: { display: false }, grid: { display: false }, title: { display: true, text: "orders" } },
      },
      plugins: {
        legend: { position: "bottom", labels: { usePointStyle: true } },
        tooltip: { callbacks: { title: (items) => fmtTime(items[0].raw.t) } },
      },
    },
  };
  if (state.chart) {
    state.chart.data = config.data;
    state.chart.options = config.options;
    state.chart.update();
  } else {
    state.chart = new Chart($("chart"), config);
  }
  const latest = course.figures.sodiumLatest;
  const proj = course.projection.length ? course.projection[1].value : undefined;
  $("chart").setAttribute("aria-label", `Sodium over the last ${state.history} hours: ${course.sodium.length} results, latest ${latest ?? "none"} mmol/L` +
    (course.limits.length ? `; 24-h limit ${course.limits[0].value} mmol/L` : "") +
    (proj !== undefined ? `; projected ${proj} mmol/L in 24 h at the rate under review` : "; no projection") + ". The tables below give every value.");

  const fig = $("figures").tBodies[0];
  fig.replaceChildren();
  if (course.reference) {
    const tr = fig.insertRow();
    tr.dataset.figure = "reference";
    tr.insertCell().textContent = `${course.falling ? "Peak" : "Nadir"} the 24-h limit is measured from`;
    Object.assign(tr.insertCell(), { className: "num", textContent: `${course.reference.value} mmol/L, ${fmtTime(course.reference.at)}${course.reference.origin ? "" : " (interpolated at the window's start)"}` });
  }
  for (const [key, name, unit] of figureNames) {
    if (course.figures[key] === undefined) continue;
    const tr = fig.insertRow();
    tr.dataset.figure = key;
    tr.insertCell().textContent = name;
    const td = tr.insertCell();
    td.className = "num";
    td.textContent = `${course.figures[key]} ${unit}`;
  }
  const list = $("findings");
  list.replaceChildren();
  for (const f of course.findings) {
    const li = document.createElement("li");
    const ind = document.createElement("span");
    ind.className = "indicator";
    ind.textContent = f.indicator;
    li.append(ind, f.summary);
    li.dataset.rule = f.rule;
    list.append(li);
  }
  if (!course.findings.length) list.append(Object.assign(document.createElement("li"), { textContent: "No finding at this rate." }));
  const res = $("results").tBodies[0];
  res.replaceChildren();
  for (const p of course.sodium) {
    const tr = res.insertRow();
    tr.insertCell().textContent = fmtTime(p.at);
    Object.assign(tr.insertCell(), { className: "num", textContent: String(p.value) });
    tr.insertCell().textContent = p.origin || "laboratory";
  }
  const ord = $("orders").tBodies[0];
  ord.replaceChildren();
  for (const o of course.orders) {
    const tr = ord.insertRow();
    tr.insertCell().textContent = o.label;
    tr.insertCell().textContent = o.kind === "reviewed" ? "under review" : o.kind;
    Object.assign(tr.insertCell(), { className: "num", textContent: o.rateMlPerHour ?? "—" });
    Object.assign(tr.insertCell(), { className: "num", textContent: o.naKmmolPerL ?? "—" });
  }
  $("missing").textContent = course.missing.length ? "Missing data: " + course.missing.join("; ") : "";
  $("ruleset").textContent = "ruleset " + course.ruleset;
  document.body.dataset.projection = proj ?? "";
  document.body.dataset.maxRate = course.figures.maxRateMlPerHour ?? "";
}

function tryRate(value) {
  const rate = Number(value);
  if (!(rate > 0 && rate <= 1000)) {
    $("rate-note").textContent = "Enter a rate above 0 and at most 1000 mL/h.";
    return;
  }
  $("rate").value = rate;
  $("rate-range").value = rate;
  const course = compute(rate);
  $("rate-note").textContent = rate === state.ordered ? "The ordered rate." : `Trying ${rate} mL/h; the order itself is unchanged.`;
  render(course);
  document.body.dataset.rate = String(rate);
}

async function main() {
  const client = await FHIR.oauth2.ready();
  const token = client.state.tokenResponse || {};
  let context;
  try {
    context = JSON.parse(token.appContext || "");
  } catch {
    throw new Error("the card did not say which orders to show (no appContext)");
  }
  if (!Array.isArray(context.drafts) || !context.drafts.length) throw new Error("the card named no draft order");
  const patientId = client.getPatientId();
  if (!patientId) throw new Error("the launch named no patient");
  setStatus("Reading the chart…");
  // The searches of the infusion check's prefetch (hooks/services.go), so
  // the computation sees what the card's did.
  const pid = encodeURIComponent(patientId);
  const [patient, observations, requests, administrations, procedures, conditions] = await Promise.all([
    client.request(`Patient/${pid}`),
    readAll(client, `Observation?patient=${pid}&_sort=-date&_count=500`),
    readAll(client, `MedicationRequest?patient=${pid}&status=active`),
    readAll(client, `MedicationAdministration?patient=${pid}&status=in-progress`),
    readAll(client, `Procedure?patient=${pid}&status=completed`),
    readAll(client, `Condition?patient=${pid}&clinical-status=active`),
  ]);
  // Medications the orders refer to, drafted, active or running (the
  // computation reads their ingredients); contained ones come with them.
  const medRefs = [...new Set([...context.drafts, ...requests, ...administrations]
    .map((d) => d.medicationReference && d.medicationReference.reference)
    .filter((r) => typeof r === "string" && /^Medication\/[A-Za-z0-9\-.]{1,64}$/.test(r)))];
  const medications = await Promise.all(medRefs.map((r) => client.request(r).catch(() => null)));
  setStatus("Computing…");
  await loadHalite();
  state.request = {
    at: context.at || new Date().toISOString(), patientId, server: client.state.serverUrl,
    resources: [patient, ...observations, ...requests, ...administrations, ...procedures, ...conditions, ...medications.filter(Boolean)],
    drafts: context.drafts, review: context.review || 0, rule: context.rule || "",
  };
  const first = compute();
  const reviewed = first.orders.find((o) => o.kind === "reviewed");
  state.ordered = reviewed && reviewed.rateMlPerHour;
  render(first);
  if (state.ordered) {
    for (const id of ["rate", "rate-range", "rate-reset"]) $(id).disabled = false;
    $("rate").value = state.ordered;
    $("rate-range").value = state.ordered;
    $("rate-range").max = Math.max(200, Math.ceil(state.ordered * 2));
    $("rate").addEventListener("change", (e) => tryRate(e.target.value));
    $("rate-range").addEventListener("input", (e) => tryRate(e.target.value));
    $("rate-reset").addEventListener("click", () => tryRate(state.ordered));
    $("rate-form").addEventListener("submit", (e) => { e.preventDefault(); tryRate($("rate").value); });
    document.body.dataset.rate = String(state.ordered);
  } else {
    $("rate-note").textContent = "The order under review states no rate in mL/h, so no other rate can be tried.";
  }
  $("longer").disabled = false;
  $("longer").addEventListener("click", () => {
    state.history = state.history === 72 ? 168 : 72;
    $("longer").textContent = state.history === 72 ? "Show 7 days" : "Show 72 hours";
    render(compute(Number($("rate").value) || undefined));
  });
  setStatus(`Sodium course for the order under review, computed at ${fmtTime(state.request.at)}.`);
  document.body.dataset.ready = "1";
}

main().catch((e) => {
  setStatus("The sodium course could not be shown: " + e.message);
  document.body.dataset.ready = "error";
});
