// review.js: the review control of the device page's episode list. It is
// kept apart from app.js: it needs only the episode table (#episodes, one
// row per episode carrying data-episode="ID") and the page's CSRF meta tag.
// Each row gets a Review cell (the newest review, and a button that opens a
// dialog with the four labels and their meanings and a note). Saving posts
// to /api/episode/ID/review (operator role, CSRF token like the page's other
// writes); the gateway stores who and when, audits it and keeps earlier
// reviews as older revisions.
(() => {
  'use strict';
  const m = location.pathname.match(/^\/device\/([^/]+)$/);
  if (!m) return;
  const device = decodeURIComponent(m[1]);
  let labels = [];
  let reviews = {};
  let dialog = null;

  const { el, call } = window.pfKit; // kit.js

  function when(ms) {
    const d = new Date(ms);
    return d.toDateString() === new Date().toDateString() ? d.toLocaleTimeString() : d.toLocaleString();
  }

  async function load() {
    const data = await call(`/api/device/${encodeURIComponent(device)}/reviews`);
    labels = data.labels || [];
    reviews = data.reviews || {};
  }

  function cellFor(id) {
    const r = reviews[id];
    const text = r ? el('span', { class: 'review-label', 'data-label': r.label },
      r.label, el('span', { class: 'small muted' }, ` by ${r.reviewer}, ${when(Number(r.reviewed_unix_ms))}${r.revision > 1 ? ` (revision ${r.revision})` : ''}`))
      : el('span', { class: 'muted review-label' }, 'not reviewed');
    return el('td', { class: 'review' }, text, ' ',
      el('button', { type: 'button', class: 'review-open', 'data-episode': id, onclick: () => open(id) }, r ? 'Change' : 'Review'));
  }

  // decorate adds the Review column to the episode table (once per render).
  function decorate() {
    const table = document.getElementById('episodes');
    if (!table || table.dataset.reviews === 'on') return;
    table.dataset.reviews = 'on';
    const head = table.querySelector('thead tr');
    if (head) head.append(el('th', { scope: 'col' }, 'Review'));
    for (const tr of table.querySelectorAll('tbody tr[data-episode]')) tr.append(cellFor(tr.dataset.episode));
  }

  function redraw() {
    const table = document.getElementById('episodes');
    if (!table) return;
    for (const tr of table.querySelectorAll('tbody tr[data-episode]')) {
      const old = tr.querySelector('td.review');
      if (old) old.replaceWith(cellFor(tr.dataset.episode));
    }
  }

  function open(id) {
    if (!dialog) {
      dialog = el('dialog', { id: 'review-dialog', 'aria-labelledby': 'review-title' });
      document.body.append(dialog);
    }
    const current = reviews[id];
    const choices = labels.map(l => el('div', { class: 'review-choice' }, el('label', null,
      el('input', { type: 'radio', name: 'review-label', value: l.label, checked: current && current.label === l.label }),
      ' ', el('strong', null, l.label), ' ', el('span', { class: 'small muted' }, l.meaning))));
    const note = el('textarea', { id: 'review-note', maxlength: '500', rows: '3', 'aria-label': 'note (optional, at most 500 characters)' });
    note.value = current && current.note ? current.note : '';
    const status = el('p', { id: 'review-status', role: 'status' });
    const save = el('button', { type: 'button', class: 'primary', id: 'review-save', onclick: async () => {
      const chosen = dialog.querySelector('input[name="review-label"]:checked');
      if (!chosen) { status.textContent = 'Choose a label.'; return; }
      save.disabled = true;
      try {
        const r = await call(`/api/episode/${encodeURIComponent(id)}/review`, { label: chosen.value, note: note.value });
        reviews[id] = r.review;
        redraw();
        dialog.close();
      } catch (e) {
        status.textContent = e.message;
      } finally {
        save.disabled = false;
      }
    } }, 'Save review');
    dialog.replaceChildren(...[
      el('h2', { id: 'review-title' }, `Review of episode ${id}`),
      current ? el('p', { class: 'small muted' }, `Now: ${current.label} by ${current.reviewer}; a new review keeps this one as an earlier revision.`) : null,
      el('fieldset', null, el('legend', null, 'Was this alarm real and actionable?'), choices),
      el('p', null, note),
      status,
      el('div', { class: 'actions' }, save, ' ', el('button', { type: 'button', onclick: () => dialog.close() }, 'Cancel')),
    ].filter(Boolean));
    dialog.showModal();
  }

  const observer = new MutationObserver(() => {
    const table = document.getElementById('episodes');
    if (table && table.dataset.reviews !== 'on') {
      decorate();
      load().then(redraw).catch(() => {});
    }
  });
  observer.observe(document.body, { childList: true, subtree: true });
  load().then(decorate).catch(() => {});
})();
