// The 3D view of a trackfactor report: the point cloud (each point in its
// tracked colour) and the cameras, on a plain 2D canvas. Drag to rotate,
// wheel (or +/-) to zoom, double-click (or 0) to reset; arrow keys rotate.
// World frame: camera 0's (x right, y down, z the viewing direction), so the
// start view looks at the part roughly as frame 0 shows it.
(function () {
  "use strict";
  var dataEl = document.getElementById("tf-data");
  var canvas = document.getElementById("view3d");
  if (!dataEl || !canvas || !canvas.getContext) {
    return;
  }
  var data = JSON.parse(dataEl.textContent);
  var ctx = canvas.getContext("2d");
  var P = data.points || [];
  var n = Math.floor(P.length / 6);
  var cams = data.cameras || [];
  var BACKGROUND = "#1d232b"; // also read by the browser test
  var START = { yaw: 0.55, pitch: -0.35, zoom: 1 };
  var view = { yaw: START.yaw, pitch: START.pitch, zoom: START.zoom };

  // Centre and size of the cloud: the median of each coordinate and the
  // 95th percentile of the distance to it, so that a few stray points do
  // not shrink the part to a dot.
  function median(a) {
    var s = a.slice().sort(function (x, y) { return x - y; });
    return s.length ? s[Math.floor(s.length / 2)] : 0;
  }
  var xs = [], ys = [], zs = [], i;
  for (i = 0; i < n; i++) {
    xs.push(P[6 * i]);
    ys.push(P[6 * i + 1]);
    zs.push(P[6 * i + 2]);
  }
  var centre = [median(xs), median(ys), median(zs)];
  var dists = [];
  for (i = 0; i < n; i++) {
    var dx = xs[i] - centre[0], dy = ys[i] - centre[1], dz = zs[i] - centre[2];
    dists.push(Math.sqrt(dx * dx + dy * dy + dz * dz));
  }
  dists.sort(function (a, b) { return a - b; });
  var radius = dists.length ? dists[Math.min(dists.length - 1, Math.floor(0.95 * dists.length))] : 1;
  if (!(radius > 0)) {
    radius = 1;
  }

  // Cameras of affine models have no centre; each is drawn on its viewing
  // direction at a fixed distance from the cloud, looking at it.
  var camDist = 1.45 * radius;
  var camSize = 0.13 * radius;
  var camGlyphs = cams.map(function (c) {
    var r = c.r; // rows: image x axis, image y axis, viewing direction
    var a = [r[0], r[1], r[2]], b = [r[3], r[4], r[5]], d = [r[6], r[7], r[8]];
    var C = [centre[0] - camDist * d[0], centre[1] - camDist * d[1], centre[2] - camDist * d[2]];
    function corner(sa, sb) {
      return [0, 1, 2].map(function (k) {
        return C[k] + camSize * (d[k] + sa * 0.75 * a[k] + sb * 0.55 * b[k]);
      });
    }
    return { frame: c.f, centre: C, corners: [corner(-1, -1), corner(1, -1), corner(1, 1), corner(-1, 1)] };
  });

  function rotation(yaw, pitch) {
    var cy = Math.cos(yaw), sy = Math.sin(yaw), cp = Math.cos(pitch), sp = Math.sin(pitch);
    // Rx(pitch) · Ry(yaw)
    return [
      [cy, 0, -sy],
      [sp * sy, cp, sp * cy],
      [cp * sy, -sp, cp * cy]
    ];
  }

  var W = 0, H = 0, dpr = 1;
  function resize() {
    dpr = window.devicePixelRatio || 1;
    var rect = canvas.getBoundingClientRect();
    W = Math.max(1, Math.round(rect.width * dpr));
    H = Math.max(1, Math.round(rect.height * dpr));
    if (canvas.width !== W || canvas.height !== H) {
      canvas.width = W;
      canvas.height = H;
    }
    schedule();
  }

  var R, scale, eye;
  function project(p, out) {
    var x = p[0] - centre[0], y = p[1] - centre[1], z = p[2] - centre[2];
    var qx = R[0][0] * x + R[0][1] * y + R[0][2] * z;
    var qy = R[1][0] * x + R[1][1] * y + R[1][2] * z;
    var qz = R[2][0] * x + R[2][1] * y + R[2][2] * z;
    var den = eye + qz;
    if (den < 0.05 * eye) {
      return false;
    }
    var f = eye / den;
    out[0] = W / 2 + scale * qx * f;
    out[1] = H / 2 + scale * qy * f;
    out[2] = qz;
    out[3] = f;
    return true;
  }

  var order = new Uint32Array(n);
  var sx = new Float32Array(n), sy = new Float32Array(n), sz = new Float32Array(n), sf = new Float32Array(n);
  var vis = new Uint8Array(n);
  var tmp = [0, 0, 0, 0];

  function draw() {
    pending = false;
    R = rotation(view.yaw, view.pitch);
    scale = 0.44 * Math.min(W, H) / radius * view.zoom;
    eye = 5 * radius;
    ctx.fillStyle = BACKGROUND;
    ctx.fillRect(0, 0, W, H);
    if (n === 0) {
      ctx.fillStyle = "#e8e8e8";
      ctx.font = 14 * dpr + "px system-ui, sans-serif";
      ctx.fillText("no points to show", 16 * dpr, 28 * dpr);
      return;
    }
    var p = [0, 0, 0];
    for (var i = 0; i < n; i++) {
      p[0] = P[6 * i];
      p[1] = P[6 * i + 1];
      p[2] = P[6 * i + 2];
      vis[i] = project(p, tmp) ? 1 : 0;
      sx[i] = tmp[0];
      sy[i] = tmp[1];
      sz[i] = tmp[2];
      sf[i] = tmp[3];
      order[i] = i;
    }
    // Painter's order: far points first.
    var ord = Array.prototype.slice.call(order);
    ord.sort(function (a, b) { return sz[b] - sz[a]; });
    var base = Math.max(2.5, Math.min(8, 4 * Math.sqrt(view.zoom))) * dpr;

    drawCameras(true);
    for (var k = 0; k < ord.length; k++) {
      var j = ord[k];
      if (!vis[j]) {
        continue;
      }
      var s = base * sf[j];
      ctx.fillStyle = "rgb(" + P[6 * j + 3] + "," + P[6 * j + 4] + "," + P[6 * j + 5] + ")";
      ctx.fillRect(sx[j] - s / 2, sy[j] - s / 2, s, s);
    }
    drawCameras(false);
    drawAxes();
  }

  // Cameras: the path through the camera positions, then each camera as a
  // small pyramid (apex at the camera, base towards the part). Camera 0 is
  // drawn thicker and labelled.
  function drawCameras(pathOnly) {
    var a = [0, 0, 0, 0], b = [0, 0, 0, 0];
    ctx.lineWidth = 1.2 * dpr;
    if (pathOnly) {
      ctx.strokeStyle = "rgba(230,159,0,0.55)";
      ctx.beginPath();
      var started = false;
      camGlyphs.forEach(function (g) {
        if (project(g.centre, a)) {
          if (started) {
            ctx.lineTo(a[0], a[1]);
          } else {
            ctx.moveTo(a[0], a[1]);
            started = true;
          }
        }
      });
      ctx.stroke();
      return;
    }
    camGlyphs.forEach(function (g, idx) {
      if (!project(g.centre, a)) {
        return;
      }
      ctx.strokeStyle = "#E69F00"; // Okabe–Ito orange
      ctx.lineWidth = (idx === 0 ? 2.4 : 1.1) * dpr;
      ctx.beginPath();
      var pts = [];
      g.corners.forEach(function (c) {
        if (project(c, b)) {
          ctx.moveTo(a[0], a[1]);
          ctx.lineTo(b[0], b[1]);
          pts.push([b[0], b[1]]);
        }
      });
      if (pts.length === 4) {
        ctx.moveTo(pts[0][0], pts[0][1]);
        for (var k = 1; k <= 4; k++) {
          ctx.lineTo(pts[k % 4][0], pts[k % 4][1]);
        }
      }
      ctx.stroke();
      if (idx === 0) {
        ctx.fillStyle = "#E69F00";
        ctx.font = 12 * dpr + "px system-ui, sans-serif";
        ctx.fillText("frame " + g.frame, a[0] + 6 * dpr, a[1] - 6 * dpr);
      }
    });
  }

  // World axes in the corner, told apart by letter as well as colour
  // (Okabe–Ito vermilion, bluish green, sky blue).
  function drawAxes() {
    var o = [44 * dpr, H - 44 * dpr], L = 26 * dpr;
    var axes = [["x", "#D55E00", 0], ["y", "#009E73", 1], ["z", "#56B4E9", 2]];
    ctx.font = 11 * dpr + "px system-ui, sans-serif";
    ctx.lineWidth = 2 * dpr;
    axes.forEach(function (ax) {
      var k = ax[2];
      var ex = R[0][k], ey = R[1][k];
      ctx.strokeStyle = ax[1];
      ctx.beginPath();
      ctx.moveTo(o[0], o[1]);
      ctx.lineTo(o[0] + L * ex, o[1] + L * ey);
      ctx.stroke();
      ctx.fillStyle = ax[1];
      ctx.fillText(ax[0], o[0] + (L + 7 * dpr) * ex - 3 * dpr, o[1] + (L + 7 * dpr) * ey + 4 * dpr);
    });
  }

  var pending = false;
  function schedule() {
    if (!pending) {
      pending = true;
      window.requestAnimationFrame(draw);
    }
  }

  function clampPitch() {
    view.pitch = Math.max(-1.55, Math.min(1.55, view.pitch));
  }
  function zoomBy(f) {
    view.zoom = Math.max(0.1, Math.min(40, view.zoom * f));
    schedule();
  }
  function reset(yaw, pitch) {
    view.yaw = yaw;
    view.pitch = pitch;
    view.zoom = START.zoom;
    schedule();
  }

  var drag = null;
  canvas.addEventListener("pointerdown", function (e) {
    drag = { x: e.clientX, y: e.clientY };
    canvas.setPointerCapture(e.pointerId);
    canvas.classList.add("dragging");
  });
  canvas.addEventListener("pointermove", function (e) {
    if (!drag) {
      return;
    }
    view.yaw -= (e.clientX - drag.x) * 0.01;
    view.pitch -= (e.clientY - drag.y) * 0.01;
    clampPitch();
    drag.x = e.clientX;
    drag.y = e.clientY;
    schedule();
  });
  function endDrag(e) {
    if (drag) {
      drag = null;
      canvas.classList.remove("dragging");
      if (canvas.hasPointerCapture && canvas.hasPointerCapture(e.pointerId)) {
        canvas.releasePointerCapture(e.pointerId);
      }
    }
  }
  canvas.addEventListener("pointerup", endDrag);
  canvas.addEventListener("pointercancel", endDrag);
  canvas.addEventListener("wheel", function (e) {
    e.preventDefault();
    zoomBy(Math.exp(-e.deltaY * 0.0015));
  }, { passive: false });
  canvas.addEventListener("dblclick", function () { reset(START.yaw, START.pitch); });
  canvas.addEventListener("keydown", function (e) {
    var used = true;
    switch (e.key) {
      case "ArrowLeft": view.yaw += 0.08; break;
      case "ArrowRight": view.yaw -= 0.08; break;
      case "ArrowUp": view.pitch += 0.08; clampPitch(); break;
      case "ArrowDown": view.pitch -= 0.08; clampPitch(); break;
      case "+": case "=": zoomBy(1.15); break;
      case "-": zoomBy(1 / 1.15); break;
      case "0": reset(START.yaw, START.pitch); break;
      default: used = false;
    }
    if (used) {
      e.preventDefault();
      schedule();
    }
  });
  function button(id, fn) {
    var b = document.getElementById(id);
    if (b) {
      b.addEventListener("click", fn);
    }
  }
  button("view-reset", function () { reset(START.yaw, START.pitch); });
  button("view-cam0", function () { reset(0, 0); });

  window.addEventListener("resize", resize);
  resize();
})();
