// The job pages of demaudit: fetch the JSON of /jobs and /jobs/{id} with the bearer token kept
// in this tab's sessionStorage (never in an address), poll while a job runs, then show its
// report in a sandboxed frame. Job data reaches the page as text (textContent), never as markup.
"use strict";

(function () {
  const KEY = "demaudit.token";
  const JOB_POLL_MS = 1000;
  const LIST_POLL_MS = 3000;
  const FINISHED = ["successful", "failed", "dismissed"];
  // every status, waiting jobs included (without a status parameter /jobs leaves them out)
  const LISTED = ["accepted", "running", ...FINISHED].map((s) => "status=" + s).join("&");
  const body = document.body;
  const base = body.dataset.base || "";
  const $ = (id) => document.getElementById(id);

  class Unauthorized extends Error {}

  async function api(path, accept) {
    const headers = { Accept: accept || "application/json" };
    const token = sessionStorage.getItem(KEY);
    if (token) headers.Authorization = "Bearer " + token;
    const response = await fetch(base + path, { headers, cache: "no-store", credentials: "omit" });
    if (response.status === 401) {
      askToken(token ? "The server did not accept this token." : "");
      throw new Unauthorized();
    }
    return response;
  }

  async function problemText(response) {
    try {
      const problem = await response.json();
      return problem.detail || problem.title || "HTTP " + response.status;
    } catch (e) {
      return "HTTP " + response.status;
    }
  }

  function askToken(problem) {
    $("token-panel").hidden = false;
    $("token-problem").textContent = problem;
    $("token-input").focus();
  }

  function setUpToken(start) {
    $("token-form").addEventListener("submit", (event) => {
      event.preventDefault();
      const token = $("token-input").value.trim();
      $("token-input").value = "";
      if (!token) return;
      sessionStorage.setItem(KEY, token);
      $("token-panel").hidden = true;
      $("forget-token").hidden = false;
      start();
    });
    $("forget-token").hidden = !sessionStorage.getItem(KEY);
    $("forget-token").addEventListener("click", () => {
      sessionStorage.removeItem(KEY);
      location.reload();
    });
  }

  function when(stamp) {
    return stamp ? stamp.replace("T", " ").replace(/\.\d+/, "").replace(/(Z|\+00:00)$/, "") : "–";
  }

  function cell(row, text, className) {
    const td = row.insertCell();
    td.textContent = text;
    if (className) td.className = className;
    return td;
  }

  function jobLink(id) {
    return base + "/jobs/" + encodeURIComponent(id);
  }

  // --- the list -----------------------------------------------------------------------------

  async function showList() {
    let response;
    try {
      response = await api("/jobs?limit=100&" + LISTED);
    } catch (e) {
      if (!(e instanceof Unauthorized)) $("list-state").textContent = "cannot reach the server";
      return e instanceof Unauthorized ? null : LIST_POLL_MS;
    }
    if (!response.ok) {
      $("list-state").textContent = await problemText(response);
      return null;
    }
    const list = await response.json();
    const rows = $("jobs").tBodies[0];
    rows.replaceChildren();
    for (const job of list.jobs) {
      const row = rows.insertRow();
      row.dataset.job = job.jobID;
      const link = document.createElement("a");
      link.href = jobLink(job.jobID);
      link.textContent = job.jobID.slice(0, 12);
      cell(row, "").appendChild(link);
      cell(row, job.status, "status " + job.status);
      cell(row, job.progress + " %", "number");
      cell(row, job.tiles.total ? job.tiles.done + " / " + job.tiles.total : "–", "number");
      cell(row, when(job.created));
      cell(row, job.message);
    }
    $("jobs").hidden = list.jobs.length === 0;
    $("list-state").textContent = list.jobs.length
      ? list.numberMatched + " job(s)" + (list.numberMatched > list.jobs.length ? ", newest " + list.jobs.length + " shown" : "")
      : "no jobs yet";
    return LIST_POLL_MS;
  }

  // --- one job ------------------------------------------------------------------------------

  async function showJob(id) {
    let response;
    try {
      response = await api("/jobs/" + encodeURIComponent(id));
    } catch (e) {
      if (!(e instanceof Unauthorized)) $("job-state").textContent = "cannot reach the server";
      return e instanceof Unauthorized ? null : JOB_POLL_MS;
    }
    if (!response.ok) {
      $("job-state").textContent = await problemText(response);
      $("job").hidden = true;
      return null;
    }
    const job = await response.json();
    $("job").hidden = false;
    $("job-state").textContent = FINISHED.includes(job.status) ? "" : "updating every second";
    $("status").textContent = job.status;
    $("status").className = "status " + job.status;
    $("progress").textContent = String(job.progress);
    $("progress-bar").value = job.progress;
    $("tiles-done").textContent = String(job.tiles.done);
    $("tiles-total").textContent = job.tiles.total ? String(job.tiles.total) : "?";
    $("message").textContent = job.message;
    $("created").textContent = when(job.created);
    $("started").textContent = when(job.started);
    $("finished").textContent = when(job.finished);
    if (!FINISHED.includes(job.status)) return JOB_POLL_MS;
    if (job.status === "successful") await showReport(id);
    return null;
  }

  function dataUrl(blob) {
    return new Promise((resolve, reject) => {
      const reader = new FileReader();
      reader.onload = () => resolve(reader.result);
      reader.onerror = () => reject(reader.error);
      reader.readAsDataURL(blob);
    });
  }

  async function showReport(id) {
    $("report-section").hidden = false;
    $("report-state").textContent = "loading the report…";
    const path = "/jobs/" + encodeURIComponent(id);
    const response = await api(path + "/report", "text/html");
    if (!response.ok) {
      $("report-state").textContent = await problemText(response);
      return;
    }
    const html = await response.text();
    const doc = new DOMParser().parseFromString(html, "text/html");
    // figures the report names by file: fetched with the token, embedded as data: addresses
    for (const img of doc.querySelectorAll("img[src]")) {
      const src = img.getAttribute("src");
      if (!/^[A-Za-z0-9_.-]+$/.test(src)) continue;
      const figure = await api(path + "/figures/" + encodeURIComponent(src), "image/*");
      if (figure.ok) img.setAttribute("src", await dataUrl(await figure.blob()));
    }
    const page = "<!DOCTYPE html>\n" + doc.documentElement.outerHTML;
    $("report").srcdoc = page;
    $("report-download").href = URL.createObjectURL(new Blob([page], { type: "text/html" }));
    $("report-state").textContent = "";
  }

  // --- start --------------------------------------------------------------------------------

  function loop(step) {
    let timer = null;
    const run = async () => {
      clearTimeout(timer);
      let next = null;
      try {
        next = await step();
      } catch (e) {
        if (!(e instanceof Unauthorized)) console.error(e);
      }
      if (next) timer = setTimeout(run, next);
    };
    return run;
  }

  const start =
    body.dataset.page === "job" ? loop(() => showJob(body.dataset.job)) : loop(showList);
  setUpToken(start);
  start();
})();
