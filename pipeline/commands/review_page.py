"""The review page: its HTML shell, style sheet and script, served by ``loam review``.

The HTML holds no data: the script fetches the queue as JSON and writes every
transcript, file name and note into the page with ``textContent`` (never as markup),
and the content security policy allows scripts from the server alone.
"""

from __future__ import annotations

HTML = """<!doctype html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>loam review</title><link rel="stylesheet" href="app.css"></head>
<body>
<header>
  <h1>loam review</h1>
  <div id="progress" role="status">loading…</div>
  <label>flag <select id="f-why"></select></label>
  <label>speaker <select id="f-speaker"></select></label>
  <label>subset <select id="f-subset"></select></label>
</header>
<p id="keys">keys: <kbd>space</kbd> play · <kbd>j</kbd>/<kbd>→</kbd> next · <kbd>k</kbd>/<kbd>←</kbd> previous ·
<kbd>a</kbd> keep as is · <kbd>e</kbd> edit transcript, <kbd>ctrl</kbd>+<kbd>enter</kbd> save ·
<kbd>w</kbd> transcript wrong for this audio · <kbd>x</kbd> exclude · <kbd>p</kbd> accept pronunciations ·
<kbd>esc</kbd> leave a field</p>
<main id="main"></main>
<p id="status" role="status"></p>
<script src="app.js"></script>
</body></html>
"""

CSS = """
body { font: 15px/1.4 system-ui, sans-serif; margin: 0; color: #1d1d1f; background: #f6f6f4; }
header { display: flex; gap: 1.2em; align-items: center; flex-wrap: wrap; padding: .6em 1em;
         background: #23313f; color: #fff; }
header h1 { font-size: 1.1em; margin: 0; }
header select { max-width: 14em; }
#progress { font-weight: 600; }
#keys { margin: .4em 1em; color: #555; font-size: .85em; }
kbd { border: 1px solid #aaa; border-radius: 3px; padding: 0 .3em; background: #fff; font-size: .9em; }
main { display: flex; gap: 1em; padding: 0 1em; align-items: flex-start; }
.card { flex: 1; background: #fff; border: 1px solid #ccd; border-radius: 6px; padding: .8em 1em; min-width: 0; }
.card.current { border-color: #2f6db5; box-shadow: 0 0 0 2px #2f6db533; }
.card h2 { font-size: 1em; margin: 0 0 .3em; font-family: ui-monospace, monospace; overflow-wrap: anywhere; }
.meta { color: #555; font-size: .9em; overflow-wrap: anywhere; }
.why span, .decided { display: inline-block; margin: .15em .3em .15em 0; padding: 0 .45em; border-radius: 9px;
         background: #fde7c8; color: #6b3d00; font-size: .85em; }
.decided { background: #d7f0da; color: #1d5a26; }
img.spec { width: 100%; height: 96px; display: block; margin: .4em 0 0; background: #000; }
.caption { color: #666; font-size: .8em; margin-bottom: .3em; overflow-wrap: anywhere; }
audio { width: 100%; }
textarea { width: 100%; box-sizing: border-box; font: inherit; min-height: 3.2em; }
.field { margin: .35em 0; }
.field b { display: inline-block; min-width: 6.5em; color: #333; }
.mono { font-family: ui-monospace, monospace; font-size: .9em; overflow-wrap: anywhere; }
table.fig { border-collapse: collapse; font-size: .85em; margin: .3em 0; }
table.fig td { padding: 0 .8em 0 0; }
table.fig tr.hot td { font-weight: 700; color: #8a3b00; }
.oov { display: flex; gap: .5em; align-items: center; margin: .2em 0; }
.oov input { flex: 1; font-family: ui-monospace, monospace; }
.actions { display: flex; flex-wrap: wrap; gap: .4em; margin-top: .6em; align-items: center; }
button { font: inherit; padding: .2em .7em; cursor: pointer; }
#status { margin: .5em 1em; min-height: 1.4em; color: #1d5a26; }
#status.error { color: #a40000; }
.empty { padding: 2em; color: #555; }
"""

JS = r"""
'use strict';
const REASONS = ['not speech', 'wrong speaker', 'unusable audio', 'duplicate', 'personal information', 'other'];
const S = { items: [], shown: [], at: 0, decided: {}, byId: {} };
// The figure each flag is about, shown in bold when the clip carries the flag.
const FIGURE_OF = { noisy: ['snr_db'], narrowband: ['bandwidth_hz'], rate_outlier: ['speaking_rate', 'rate_z'],
  clipped: ['clipped_fraction'], peak_limited: ['loudness_in_lufs'], near_duplicate: ['duplicate_similarity'] };

function el(tag, attrs, ...kids) {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) {
    if (k === 'text') e.textContent = v; else if (k.startsWith('on')) e.addEventListener(k.slice(2), v);
    else e.setAttribute(k, v);
  }
  for (const k of kids) if (k !== null && k !== undefined) e.append(k);
  return e;
}
function status(text, error) {
  const s = document.getElementById('status'); s.textContent = text; s.className = error ? 'error' : '';
}
function fmt(v) { return typeof v === 'number' ? (Number.isInteger(v) ? String(v) : v.toFixed(3)) : String(v); }

async function load() {
  const r = await fetch('api/queue', { headers: { 'Accept': 'application/json' } });
  if (!r.ok) { status('could not load the queue: ' + r.status, true); return; }
  const data = await r.json();
  S.items = data.items; S.decided = data.decided;
  S.byId = Object.fromEntries(S.items.map(it => [it.clip_id, it]));
  fillFilter('f-why', [...new Set(S.items.flatMap(it => it.why))].sort());
  fillFilter('f-speaker', [...new Set(S.items.map(it => it.speaker))].sort());
  fillFilter('f-subset', [...new Set(S.items.map(it => it.subset || 'rejected'))].sort());
  // Filters may be preset in the address: #why=oov&speaker=...&subset=...
  const preset = new URLSearchParams(location.hash.slice(1));
  for (const key of ['why', 'speaker', 'subset']) {
    const sel = document.getElementById('f-' + key), want = preset.get(key);
    if (want && [...sel.options].some(o => o.value === want)) sel.value = want;
  }
  applyFilters();
  document.body.dataset.loaded = 'yes';
}
function fillFilter(id, values) {
  const sel = document.getElementById(id);
  sel.replaceChildren(el('option', { value: '', text: 'all' }), ...values.map(v => el('option', { value: v, text: v })));
  sel.onchange = () => { applyFilters(); sel.blur(); };
}
function applyFilters() {
  const why = document.getElementById('f-why').value, spk = document.getElementById('f-speaker').value;
  const sub = document.getElementById('f-subset').value;
  S.shown = S.items.filter(it => (!why || it.why.includes(why)) && (!spk || it.speaker === spk)
    && (!sub || (it.subset || 'rejected') === sub));
  S.at = Math.min(S.at, Math.max(0, S.shown.length - 1));
  render();
}
function progress() {
  const done = S.items.filter(it => S.decided[it.clip_id]).length;
  document.getElementById('progress').textContent =
    `reviewed ${done} / queued ${S.items.length}` + (S.shown.length !== S.items.length ? ` · showing ${S.shown.length}` : '');
}

function card(it, current) {
  const f = it.figures, figs = el('table', { class: 'fig' });
  const hot = new Set(it.flags.flatMap(fl => FIGURE_OF[fl] || []));
  for (const k of Object.keys(f)) if (f[k] !== null && f[k] !== undefined)
    figs.append(el('tr', { class: hot.has(k) ? 'hot' : '' }, el('td', { text: k }), el('td', { class: 'mono', text: fmt(f[k]) })));
  const ta = el('textarea', { id: current ? 'transcript' : '', 'aria-label': 'transcript', spellcheck: 'false' });
  ta.value = it.transcript || '';
  const oov = it.oov.map(o => {
    const inp = el('input', { value: o.phones, 'aria-label': 'phones of ' + o.word, 'data-word': o.word });
    return el('div', { class: 'oov' }, el('span', { class: 'mono', text: o.word }), inp,
      el('span', { class: 'meta', text: o.source }),
      el('button', { text: 'accept phones', onclick: () => decideWord(it, o.word, inp.value) }));
  });
  const decided = S.decided[it.clip_id];
  const c = el('section', { class: 'card' + (current ? ' current' : ''), 'data-clip': it.clip_id },
    el('h2', { text: it.clip_id }),
    el('div', { class: 'meta', text: `speaker ${it.speaker} · ${it.subset || 'rejected: ' + it.rejected}` +
      (it.part ? ` · part ${it.part}` : '') +
      (it.tiers.length ? ` · tiers ${it.tiers.join(', ')}` : '') + ` · ${it.source_path}` }),
    el('div', { class: 'why' }, ...it.why.map(w => el('span', { text: w })),
      decided ? el('span', { class: 'decided', text: 'decided: ' + decided }) : null),
    el('img', { class: 'spec', alt: 'spectrogram of ' + it.clip_id, src: 'picture/' + encodeURIComponent(it.clip_id) }),
    el('div', { class: 'caption', text: `spectrogram, 0 to ${it.sample_rate / 2000} kHz, ${fmt(it.figures.duration_s)} s` +
      (it.near_duplicate_of ? ` · near-duplicate of ${it.near_duplicate_of}` : '') }),
    el('audio', { controls: '', preload: current ? 'auto' : 'metadata', src: 'audio/' + encodeURIComponent(it.clip_id) }),
    el('div', { class: 'field' }, el('b', { text: 'transcript' }), it.transcript_origin ?
      el('span', { class: 'meta', text: ' from ' + it.transcript_origin }) : null), ta,
    el('div', { class: 'field' }, el('b', { text: 'normalised' }), el('span', { text: it.norm_text || '—' })),
    el('div', { class: 'field' }, el('b', { text: 'phones' }), el('span', { class: 'mono', text: it.phones || '—' })),
    ...oov, figs);
  const reason = el('select', { 'aria-label': 'exclusion reason' }, ...REASONS.map(r => el('option', { value: r, text: r })));
  const note = el('input', { placeholder: 'note (optional)', 'aria-label': 'note' });
  const acts = el('div', { class: 'actions' },
    el('button', { text: 'keep as is (a)', onclick: () => decide(it, { decision: 'keep' }) }),
    el('button', { text: 'save transcript (ctrl+enter)', onclick: () => saveFix(it, ta) }),
    el('button', { text: 'transcript wrong (w)', onclick: () => decide(it, { decision: 'wrong_transcript' }) }),
    reason, note,
    el('button', { text: 'exclude (x)', onclick: () => exclude(it, reason.value, note.value) }));
  const other = it.near_duplicate_of && S.byId[it.near_duplicate_of];
  if (other) acts.append(el('button', { text: 'keep this copy', onclick: () =>
    exclude(other, 'duplicate', 'near-duplicate; kept ' + it.clip_id) }));
  c.append(acts);
  if (current) { c.reason = reason; c.note = note; }
  return c;
}
function render() {
  progress();
  const main = document.getElementById('main');
  if (!S.shown.length) { main.replaceChildren(el('p', { class: 'empty', text: 'nothing queued under these filters' })); return; }
  const it = S.shown[S.at];
  const cards = [card(it, true)];
  const other = it.near_duplicate_of && S.byId[it.near_duplicate_of];
  if (other) cards.push(card(other, false));
  main.replaceChildren(...cards);
  status(`clip ${S.at + 1} of ${S.shown.length}`);
}
function move(step) { if (!S.shown.length) return; S.at = (S.at + step + S.shown.length) % S.shown.length; render(); }

async function post(body) {
  const r = await fetch('api/decide', { method: 'POST', headers: { 'Content-Type': 'application/json' },
    body: JSON.stringify(body) });
  const data = await r.json().catch(() => ({ error: 'no answer' }));
  if (!r.ok) { status('not recorded: ' + (data.error || r.status), true); return null; }
  S.decided = data.decided;
  return data;
}
async function decide(it, body, advance = true) {
  const ok = await post({ clip_id: it.clip_id, ...body });
  if (!ok) return;
  const at = S.at; if (advance) move(1); else render();
  status(`recorded: ${body.decision} for ${it.clip_id}` + (advance ? ` (was ${at + 1} of ${S.shown.length})` : ''));
}
function saveFix(it, ta) {
  const text = ta.value.trim();
  if (!text) { status('the transcript is empty: use "transcript wrong" instead', true); return; }
  if (text === (it.transcript || '')) { status('the transcript is unchanged: use "keep as is"', true); return; }
  decide(it, { decision: 'fix_transcript', transcript: text });
}
function exclude(it, reason, note) { decide(it, { decision: 'exclude', reason: reason, note: note }, it === S.shown[S.at]); }
async function decideWord(it, word, phones) {
  const list = phones.trim().split(/\s+/).filter(Boolean);
  if (!list.length) { status('no phones given for ' + word, true); return; }
  if (await post({ clip_id: it.clip_id, decision: 'pronunciation', word: word, phones: list }))
    { render(); status(`recorded: pronunciation of ${word}: ${list.join(' ')}`); }
}

document.addEventListener('keydown', ev => {
  const typing = ['TEXTAREA', 'INPUT', 'SELECT'].includes(document.activeElement.tagName);
  const it = S.shown[S.at];
  if (typing) {
    if (ev.key === 'Escape') document.activeElement.blur();
    else if (ev.key === 'Enter' && ev.ctrlKey && document.activeElement.id === 'transcript' && it)
      { ev.preventDefault(); saveFix(it, document.activeElement); }
    return;
  }
  if (!it || ev.ctrlKey || ev.metaKey || ev.altKey) return;
  const cur = document.querySelector('.card.current');
  const keys = {
    ' ': () => { const a = cur.querySelector('audio'); a.paused ? a.play() : a.pause(); },
    'j': () => move(1), 'ArrowRight': () => move(1), 'k': () => move(-1), 'ArrowLeft': () => move(-1),
    'a': () => decide(it, { decision: 'keep' }),
    'e': () => document.getElementById('transcript').focus(),
    'w': () => decide(it, { decision: 'wrong_transcript' }),
    'x': () => exclude(it, cur.reason.value, cur.note.value),
    'p': async () => { for (const inp of cur.querySelectorAll('.oov input')) await decideWord(it, inp.dataset.word, inp.value); },
  };
  if (keys[ev.key]) { ev.preventDefault(); keys[ev.key](); }
});
load();
"""
