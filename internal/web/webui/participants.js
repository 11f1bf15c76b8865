// participants.js: the study-participant panel of the device page. It is
// kept apart from app.js and device.js: it needs only the device page's
// #alarm panel (it places itself after it) and the page's CSRF meta tag.
// It shows the device's current participant, its enrolment history, a form
// to enrol the device to a participant id from now or from an earlier time
// (with an optional note)
// and a button to end the current enrolment. Both post to the gateway's
// ParticipantService through /api/device/ID/enrol and
// /api/device/ID/enrolment/end (operator role, CSRF token like the page's
// other writes); the gateway checks the id, refuses overlaps and audits.
// Its errors are shown as they come. Deletion is not on the page.
(() => {
  'use strict';
  const m = location.pathname.match(/^\/device\/([^/]+)$/);
  if (!m) return;
  const device = decodeURIComponent(m[1]);
  const base = `/api/device/${encodeURIComponent(device)}`;
  let panel = null;
  let list = [];
  let nowMS = 0;

  const { el, call } = window.pfKit; // kit.js

  const when = ms => new Date(ms).toLocaleString();

  // current is the device's open enrolment (at most one: the gateway
  // refuses overlaps), else null.
  function current() {
    return list.find(e => !Number(e.to_unix_ms) && Number(e.from_unix_ms) <= nowMS) || null;
  }

  async function load() {
    const data = await call(`${base}/enrolments`);
    list = data.enrolments || [];
    nowMS = Number(data.now_ms) || Date.now();
  }

  function history() {
    const rows = list.slice().reverse().map(e => el('tr', { 'data-enrolment': e.enrolment_id },
      el('td', { class: 'pid' }, e.participant_id),
      el('td', null, when(Number(e.from_unix_ms))),
      el('td', null, Number(e.to_unix_ms) ? when(Number(e.to_unix_ms)) : 'open'),
      el('td', null, e.note || ''),
      el('td', null, `${e.created_by || ''}, ${when(Number(e.created_unix_ms))}`)));
    return el('div', { class: 'scroll' }, el('table', { id: 'enrolments' },
      el('thead', null, el('tr', null, ['Participant', 'From', 'To', 'Note', 'Entered by'].map(t => el('th', { scope: 'col' }, t)))),
      el('tbody', null, rows.length ? rows : el('tr', null, el('td', { colspan: 5, class: 'muted' }, 'This device was never enrolled.')))));
  }

  function render(message) {
    const cur = current();
    const status = el('p', { id: 'enrol-status', role: 'status' }, message || '');
    const pid = el('input', { id: 'enrol-participant', type: 'text', maxlength: '32', autocomplete: 'off', spellcheck: 'false',
      placeholder: 'e.g. P-0001', 'aria-label': 'participant id (pseudonymous study code, never a name)' });
    const note = el('input', { id: 'enrol-note', type: 'text', maxlength: '200', 'aria-label': 'note (optional, at most 200 bytes)', placeholder: 'note (optional)' });
    const from = el('input', { id: 'enrol-from', type: 'datetime-local', step: '1', 'aria-label': 'enrolled from (optional, this browser\'s local time; empty: now)' });
    const act = (btn, fn) => async () => {
      btn.disabled = true;
      try {
        await fn();
        await load();
        render();
      } catch (e) {
        status.textContent = e.message; // the gateway's own words: the rule, or both intervals
        status.className = 'error';
      } finally {
        btn.disabled = false;
      }
    };
    const enrol = el('button', { type: 'button', class: 'primary', id: 'enrol-save' }, 'Enrol');
    enrol.addEventListener('click', act(enrol, () => {
      const body = { participant: pid.value.trim(), note: note.value };
      if (from.value) { // an earlier start, for data already stored; the gateway refuses overlaps
        const ms = new Date(from.value).getTime();
        if (!Number.isFinite(ms)) throw new Error(`from: "${from.value}" is not a date and time`);
        body.from_unix_ms = ms;
      }
      return call(`${base}/enrol`, body);
    }));
    let end = null;
    if (cur) {
      end = el('button', { type: 'button', id: 'enrol-end' }, `End enrolment of ${cur.participant_id}`);
      end.addEventListener('click', act(end, () => call(`${base}/enrolment/end`, { participant: cur.participant_id })));
    }
    panel.replaceChildren(
      el('h2', null, 'Study participant'),
      el('p', { id: 'enrol-current' }, cur ? ['Enrolled to ', el('strong', { class: 'pid' }, cur.participant_id), ` since ${when(Number(cur.from_unix_ms))}`, cur.note ? ` (${cur.note})` : '']
        : 'Not enrolled to a participant now.'),
      el('div', { class: 'actions' }, pid, ' ', note, ' ', el('label', null, 'from ', from), ' ', enrol, ' ', end),
      status,
      el('p', { class: 'muted small' }, 'Participant ids are pseudonymous study codes (2 to 32 of A-Z 0-9 - _, with a digit), never names. ',
        'Enrolling and ending need the operator role and are audited. From: empty enrols from now; an earlier time (this browser\'s local time) covers data already stored. ',
        'Deleting a participant\'s data (withdrawal of consent) is not possible here: it is done with the CLI only, by an admin: pulsefleet participants delete --participant PID --confirm.'),
      el('h3', null, 'Enrolment history of this device'),
      history());
  }

  function attach() {
    const alarm = document.getElementById('alarm');
    if (!alarm || document.getElementById('participant')) return;
    panel = el('div', { class: 'panel', id: 'participant' }, el('p', { class: 'muted' }, 'Loading enrolments…'));
    alarm.after(panel);
    load().then(() => render()).catch(e => render(e.message));
  }

  const observer = new MutationObserver(attach);
  observer.observe(document.body, { childList: true, subtree: true });
  attach();
})();
