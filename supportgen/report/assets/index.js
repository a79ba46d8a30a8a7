// supportgen batch index: sort the table by a column heading (click again to reverse; n/a last).
(function () {
  const table = document.getElementById('batch-table');
  const tbody = table.tBodies[0];
  let current = -1, ascending = true;
  function sortBy(col, type) {
    ascending = col === current ? !ascending : true;
    current = col;
    const rows = Array.from(tbody.rows).filter(r => r.cells.length > col);
    rows.sort((a, b) => {
      const x = a.cells[col].dataset.sort, y = b.cells[col].dataset.sort;
      if (x === '' || x === undefined) return (y === '' || y === undefined) ? 0 : 1;
      if (y === '' || y === undefined) return -1;
      const s = type === 'num' ? Number(x) - Number(y) : x.localeCompare(y);
      return ascending ? s : -s;
    });
    for (const r of rows) tbody.appendChild(r);
    for (const th of table.tHead.rows[0].cells) th.removeAttribute('aria-sort');
    table.tHead.rows[0].cells[col].setAttribute('aria-sort', ascending ? 'ascending' : 'descending');
  }
  for (const th of table.tHead.rows[0].cells) {
    const go = () => sortBy(Number(th.dataset.col), th.dataset.type);
    th.addEventListener('click', go);
    th.addEventListener('keydown', e => { if (e.key === 'Enter' || e.key === ' ') { e.preventDefault(); go(); } });
  }
  // index.html#sort=K (or #sort=-K for descending): open sorted by column K.
  const m = /^#sort=(-?)(\d+)$/.exec(location.hash);
  if (m) {
    const th = table.tHead.rows[0].cells[Number(m[2])];
    if (th) { sortBy(Number(th.dataset.col), th.dataset.type); if (m[1]) sortBy(Number(th.dataset.col), th.dataset.type); }
  }
  document.body.dataset.rows = String(tbody.rows.length);
  document.body.dataset.status = (document.body.dataset.status || '').startsWith('error') ? document.body.dataset.status : 'ready';
})();
