// kit.js: the two helpers every script of the page shares, loaded first.
// el builds an element: attributes (on* become listeners, text the text
// content; null, undefined and false are left out) and children (nodes or
// text; nested arrays are flattened). call fetches the gateway's JSON API:
// with a body it POSTs JSON with the session's CSRF token (the page's meta
// tag); a 401 goes to the login; an error answer throws an Error with the
// gateway's message (its JSON "error", else its text) and the HTTP status.
'use strict';
window.pfKit = (() => {
  function el(tag, attrs, ...kids) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v === null || v === undefined || v === false) continue;
      if (k.startsWith('on')) e.addEventListener(k.slice(2), v);
      else if (k === 'text') e.textContent = v;
      else e.setAttribute(k, v === true ? '' : v);
    }
    for (const k of kids.flat(Infinity)) {
      if (k !== null && k !== undefined && k !== false) e.append(k instanceof Node ? k : document.createTextNode(String(k)));
    }
    return e;
  }

  async function call(path, body) {
    const opt = body === undefined ? {} : {
      method: 'POST', body: JSON.stringify(body),
      headers: { 'Content-Type': 'application/json', 'X-CSRF-Token': document.querySelector('meta[name="csrf-token"]').content },
    };
    const r = await fetch(path, opt);
    if (r.status === 401) { location.href = '/login'; throw new Error('not logged in'); }
    const text = await r.text();
    let data = {};
    try { data = JSON.parse(text); } catch (e) { data = { error: text.trim() }; }
    if (!r.ok) { const e = new Error(data.error || `${r.status} ${r.statusText}`); e.status = r.status; throw e; }
    return data;
  }

  return { el, call };
})();
