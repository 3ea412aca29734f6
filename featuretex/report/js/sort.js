// batch.html: click a column heading to sort the scans by it (again to reverse). Cells sort by
// their data-key (numbers as numbers), else by their text.
(() => {
  'use strict';
  const table = document.querySelector('table.sortable');
  if (!table) return;
  const body = table.tBodies[0];
  const key = (row, i) => {
    const cell = row.cells[i];
    const k = cell ? (cell.dataset.key ?? cell.textContent.trim()) : '';
    const n = Number(k);
    return k !== '' && Number.isFinite(n) ? n : k.toLowerCase();
  };
  table.tHead.addEventListener('click', (e) => {
    const th = e.target.closest('th');
    if (!th || th.dataset.sort === undefined) return;
    const i = th.cellIndex;
    const dir = th.getAttribute('aria-sort') === 'ascending' ? -1 : 1;
    for (const h of table.tHead.querySelectorAll('th')) h.removeAttribute('aria-sort');
    th.setAttribute('aria-sort', dir === 1 ? 'ascending' : 'descending');
    const rows = Array.from(body.rows);
    rows.sort((a, b) => {
      const x = key(a, i), y = key(b, i);
      if (typeof x === typeof y) return (x < y ? -1 : x > y ? 1 : 0) * dir;
      return (typeof x === 'number' ? -1 : 1) * dir;   // numbers before text
    });
    for (const r of rows) body.appendChild(r);
  });
})();
