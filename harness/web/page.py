"""The line page: one HTML shell and one script that fills it from ``/api/line``.

Every value reaches the page through ``textContent`` or an attribute set by the DOM API,
never through HTML parsing, so a serial holding markup shows as the text it is.  The
script is served from the same origin (``/line.js``) and the Content-Security-Policy
allows no inline script, so even a mistake here could not run injected code.
"""

from __future__ import annotations

from harness import __version__
from harness.outcomes import CSS_COLOURS, VERDICTS, look

POLL_MS = 2000

PAGE = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>stageproof line</title>
<link rel="stylesheet" href="/line.css">
</head>
<body data-state="loading">
<header>
  <h1>Line status</h1>
  <form id="filters">
    <label>window
      <select name="window">
        <option value="shift">this shift</option>
        <option value="today">today</option>
        <option value="range">date range</option>
      </select>
    </label>
    <label class="range">from <input type="date" name="since"></label>
    <label class="range">to <input type="date" name="until"></label>
    <label>station <select name="station"><option value="">all</option></select></label>
    <label>part number <select name="part"><option value="">all</option></select></label>
  </form>
  <p id="status" class="note">loading…</p>
</header>
<main>
  <section><h2>Stations</h2>
    <table id="stations"><thead><tr><th>station</th><th>runs</th><th>boards</th>
    <th>first-pass yield</th><th>final yield</th><th>retested</th></tr></thead>
    <tbody></tbody></table></section>
  <section><h2>Part numbers</h2>
    <table id="parts"><thead><tr><th>part number</th><th>board</th><th>boards</th>
    <th>first-pass yield</th><th>final yield</th><th>retested</th></tr></thead>
    <tbody></tbody></table></section>
  <section><h2>Latest verdicts</h2>
    <table id="latest"><thead><tr><th>started (UTC)</th><th>serial</th><th>part number</th>
    <th>station</th><th>retest</th><th>verdict</th><th>report</th></tr></thead>
    <tbody></tbody></table></section>
  <section><h2>Failing measurements</h2>
    <table id="failing"><thead><tr><th>part number</th><th>measurement</th>
    <th>failures</th><th>boards</th></tr></thead><tbody></tbody></table></section>
  <section><h2>Process capability</h2>
    <p class="note">Cpk from each board's first finished test in the window; shown from
    __MIN__ boards on (fewer: "too few boards"); flagged below __CPK__.</p>
    <table id="capability"><thead><tr><th>part number</th><th>measurement</th><th>unit</th>
    <th>boards</th><th>Cpk</th><th>flag</th></tr></thead><tbody></tbody></table></section>
</main>
<footer class="note">stageproof __VERSION__ · read-only · refreshes every __POLL__ s.
Yields: a board counts when it has a finished test in the window; first pass is its first
finished test ever, final its last.</footer>
<script src="/line.js"></script>
</body>
</html>
"""

CSS = """
body { font: 14px/1.4 system-ui, sans-serif; margin: 1.5em; color: #1d2433; }
h1 { font-size: 1.4em; margin: 0 0 .4em; } h2 { font-size: 1.1em; margin: 1.2em 0 .3em; }
form label { margin-right: 1em; } .note { color: #5a6272; }
table { border-collapse: collapse; min-width: 40em; }
th, td { border-bottom: 1px solid #d8dbe2; padding: .25em .7em; text-align: left; }
td.n { text-align: right; font-variant-numeric: tabular-nums; }
__VERDICTS__
.flag-low { color: #b3261e; font-weight: 600; } .flag-few { color: #5a6272; }
body:not([data-window="range"]) .range { display: none; }
tr.fresh { background: #fff6c8; }
""".replace(
    # a verdict cell is classed by its word (the script sets it); the colour is the tone's
    "__VERDICTS__",
    " ".join(
        f".{word} {{ color: {CSS_COLOURS[look(word).tone]}; font-weight: 600; }}"
        for word in VERDICTS
    ),
)

SCRIPT = """'use strict';
(function () {
  const form = document.getElementById('filters');
  const status = document.getElementById('status');
  const seen = new Set();
  let first = true;
  function params() {
    const out = new URLSearchParams();
    for (const el of form.elements) { if (el.name && el.value) out.set(el.name, el.value); }
    if (out.get('window') !== 'range') { out.delete('since'); out.delete('until'); }
    return out;
  }
  function fromUrl() {
    const q = new URLSearchParams(location.search);
    for (const el of form.elements) {
      if (!el.name || !q.has(el.name)) continue;
      if (el.tagName === 'SELECT' && ![...el.options].some(o => o.value === q.get(el.name))) {
        el.appendChild(new Option(q.get(el.name), q.get(el.name)));
      }
      el.value = q.get(el.name);
    }
  }
  function cell(tr, text, cls) {
    const td = document.createElement('td');
    td.textContent = text === null || text === undefined ? '—' : String(text);
    if (cls) td.className = cls;
    tr.appendChild(td);
    return td;
  }
  function pct(x, n) { return x === null ? '—' : (100 * x).toFixed(1) + ' % (' + n + ')'; }
  function fill(id, rows, build) {
    const body = document.querySelector('#' + id + ' tbody');
    const fresh = [];
    for (const r of rows) { const tr = document.createElement('tr'); build(tr, r); fresh.push(tr); }
    body.replaceChildren(...fresh);
  }
  function options(name, values) {
    const sel = form.elements[name];
    const keep = sel.value;
    const opts = [new Option('all', '')];
    for (const v of values) opts.push(new Option(v, v));
    if (keep && !values.includes(keep)) opts.push(new Option(keep, keep));
    sel.replaceChildren(...opts);
    sel.value = keep;
  }
  function yieldCells(tr, r) {
    cell(tr, r.boards, 'n');
    cell(tr, pct(r.first_pass, r.first_pass_count), 'n');
    cell(tr, pct(r.final, r.final_count), 'n');
    cell(tr, r.retested, 'n');
  }
  function render(d) {
    document.body.dataset.window = d.window.name;
    fill('stations', d.stations, (tr, r) => {
      cell(tr, r.station); cell(tr, r.runs, 'n'); yieldCells(tr, r);
    });
    fill('parts', d.parts, (tr, r) => {
      cell(tr, r.part_number); cell(tr, r.board_name); yieldCells(tr, r);
    });
    fill('latest', d.latest, (tr, r) => {
      tr.dataset.runId = String(r.run_id);
      if (!first && !seen.has(r.run_id)) tr.className = 'fresh';
      cell(tr, r.started_at.slice(0, 19).replace('T', ' '));
      cell(tr, r.serial, 'serial');
      cell(tr, r.part_number);
      cell(tr, r.station);
      cell(tr, r.retest, 'n');
      cell(tr, r.status === 'complete' ? r.verdict : r.status, r.verdict || '');
      const a = document.createElement('a');
      a.href = '/board/' + encodeURIComponent(String(r.run_id));
      a.textContent = 'board report';
      cell(tr, '').replaceChildren(a);
    });
    for (const r of d.latest) seen.add(r.run_id);
    fill('failing', d.failing, (tr, r) => {
      cell(tr, r.part_number); cell(tr, r.measurement);
      cell(tr, r.failures, 'n'); cell(tr, r.boards, 'n');
    });
    const caps = [];
    for (const p of d.parts) for (const m of p.measurements) caps.push([p.part_number, m]);
    fill('capability', caps, (tr, [pn, m]) => {
      cell(tr, pn); cell(tr, m.measurement); cell(tr, m.unit); cell(tr, m.n, 'n');
      cell(tr, m.cpk === null ? '—' : m.cpk.toFixed(3), 'n');
      const few = m.flag === 'too few boards';
      cell(tr, m.flag, m.flag === 'low' ? 'flag-low' : (few ? 'flag-few' : ''));
    });
    options('station', d.choices.stations);
    options('part', d.choices.parts);
    status.textContent = d.window.label + ' · ' + d.runs_in_window + ' runs · updated ' +
      new Date().toLocaleTimeString();
    document.body.dataset.state = 'live';
    document.body.dataset.updates = String(Number(document.body.dataset.updates || 0) + 1);
    first = false;
  }
  async function poll() {
    try {
      const resp = await fetch('/api/line?' + params().toString(), {cache: 'no-store'});
      const d = await resp.json();
      if (!resp.ok) {
        status.textContent = d.error || ('error ' + resp.status);
        document.body.dataset.state = 'error';
      } else render(d);
    } catch (e) {
      status.textContent = 'cannot reach the server: ' + e;
      document.body.dataset.state = 'error';
    }
  }
  form.addEventListener('change', () => {
    document.body.dataset.window = form.elements.window.value;
    history.replaceState(null, '', '?' + params().toString());
    first = true; seen.clear();
    poll();
  });
  fromUrl();
  document.body.dataset.window = form.elements.window.value;
  poll();
  setInterval(poll, __POLL_MS__);
})();
"""


def page_html(min_boards: int, cpk_threshold: float) -> str:
    return (
        PAGE.replace("__MIN__", str(min_boards))
        .replace("__CPK__", f"{cpk_threshold:g}")
        .replace("__VERSION__", __version__)
        .replace("__POLL__", f"{POLL_MS / 1000:g}")
    )


def script() -> str:
    return SCRIPT.replace("__POLL_MS__", str(POLL_MS))
