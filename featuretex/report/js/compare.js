// Before/after sliders of the report's "Look closer" section: the range input (or a drag on the
// picture) moves the cut between the classical bake (left) and the delivered texture (right).
(() => {
  'use strict';
  for (const box of document.querySelectorAll('.cmp')) {
    const range = box.querySelector('input[type=range]');
    const pics = box.querySelector('.cmp-pics');
    const set = (pct) => {
      range.value = String(Math.max(0, Math.min(100, pct)));
      box.style.setProperty('--cut', range.value + '%');
    };
    range.addEventListener('input', () => set(Number(range.value)));
    let dragging = false;
    const follow = (e) => {
      const r = pics.getBoundingClientRect();
      set((e.clientX - r.left) / r.width * 100);
    };
    pics.addEventListener('pointerdown', (e) => { dragging = true; pics.setPointerCapture(e.pointerId); follow(e); });
    pics.addEventListener('pointermove', (e) => { if (dragging) follow(e); });
    pics.addEventListener('pointerup', () => { dragging = false; });
    set(Number(range.value));
  }
})();
