(function () {
  'use strict';
  // One crosshair per panel grid: every panel of a grid shows the same display grid, so a
  // fraction of a panel's width and height is the same place in all of them. The readout
  // gives the world position (mm) of the panel under the pointer.
  function world(map, fx, fy) {
    return [0, 1, 2].map(function (a) { return map.o[a] + fx * map.u[a] + fy * map.v[a]; });
  }
  function signed(value, positive, negative) {
    return (value >= 0 ? positive : negative) + ' ' + Math.abs(value).toFixed(1) + ' mm';
  }
  function describe(w) {
    return signed(w[0], 'R', 'L') + ' \u00b7 ' + signed(w[1], 'A', 'P') + ' \u00b7 ' + signed(w[2], 'S', 'I');
  }
  Array.prototype.forEach.call(document.querySelectorAll('.xgrid'), function (grid) {
    var panels = grid.querySelectorAll('.panel');
    var readout = grid.querySelector('.xyz');
    var held = false;
    function place(fx, fy, source) {
      fx = Math.min(Math.max(fx, 0), 1);
      fy = Math.min(Math.max(fy, 0), 1);
      Array.prototype.forEach.call(panels, function (panel) {
        panel.querySelector('.hair.v').style.left = (100 * fx) + '%';
        panel.querySelector('.hair.h').style.top = (100 * fy) + '%';
        panel.classList.add('crossed');
      });
      grid.setAttribute('data-fx', fx.toFixed(4));
      grid.setAttribute('data-fy', fy.toFixed(4));
      if (source && readout) {
        readout.textContent = describe(world(JSON.parse(source.getAttribute('data-map')), fx, fy)) +
          (held ? ' (held: click to release)' : '');
      }
    }
    function fractions(panel, event) {
      var box = panel.getBoundingClientRect();
      return [(event.clientX - box.left) / box.width, (event.clientY - box.top) / box.height];
    }
    Array.prototype.forEach.call(panels, function (panel) {
      panel.addEventListener('pointermove', function (event) {
        if (!held) { var f = fractions(panel, event); place(f[0], f[1], panel); }
      });
      panel.addEventListener('click', function (event) {
        held = !held;
        grid.classList.toggle('held', held);
        var f = fractions(panel, event);
        place(f[0], f[1], panel);
      });
    });
    var initial = grid.getAttribute('data-initial');
    if (initial && panels.length) {
      var at = JSON.parse(initial);
      place(at[0], at[1], panels[Math.min(at[2] || 0, panels.length - 1)]);
    }
  });
})();
