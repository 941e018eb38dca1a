// Baton fleet view: draws the coordinator's rounds (live) or a decision
// log's (replay) from the JSON documented in coordinator/view/view.go.
// Plain script, no libraries, nothing fetched from outside the fleet.
//
// Three ways in:
//   - inline data: <script id="baton-data" type="application/json">
//     {"site": Site, "frames": [Frame...]} (sim replay --html);
//   - served replay: /view/site.json with mode "replay", then
//     /view/frames.json (sim replay --view);
//   - live: /view/site.json with mode "live", /view/frames.json (the last
//     rounds), then /view/events (one "frame" event per round), catching
//     up with /view/frames.json?since=N whenever the stream (re)opens.
//
// Drawing is cheap on purpose: the map's fixed parts are drawn once, and a
// round is drawn at most once per animation frame (the newest one asked
// for), so a fast live fleet or a fast replay never queues up work.
(function () {
  'use strict';

  const LIVE_KEEP = 1200; // frames a live page holds (the strips need 100)
  const STRIP = 100; // rounds in the latency and cost strips

  const el = (id) => document.getElementById(id);
  const esc = (s) => String(s).replace(/[&<>"']/g, (c) => ({ '&': '&amp;', '<': '&lt;', '>': '&gt;', '"': '&quot;', "'": '&#39;' })[c]);
  const n2 = (v) => (Math.round(v * 100) / 100).toString();
  const num = (v) => {
    if (typeof v !== 'number' || !isFinite(v)) return String(v);
    if (Number.isInteger(v)) return String(v);
    const a = Math.abs(v);
    return a >= 100 ? v.toFixed(1) : a >= 1 ? v.toFixed(2) : v.toPrecision(3);
  };

  const S = {
    site: null,
    geo: null,
    frames: [],
    i: -1, // index of the frame shown
    live: false,
    playing: false,
    speed: 5,
    acc: 0,
    last: 0,
    drawnKey: '',
    dirty: false,
    pending: false,
  };

  // ---- geometry -----------------------------------------------------------

  // The map's coordinates (x right, y up) to the SVG's (y down). One "cell"
  // (grid) or the closest two places (graph) are U viewBox units apart;
  // marks are sized in M units (U, or more on a very large map so they
  // stay visible).
  function geometry(map) {
    const U = 40;
    let minX = 0, maxX = 1, minY = 0, maxY = 1, unit = 1;
    if (map.kind === 'grid') {
      minX = -0.5; maxX = Math.max(1, map.width) - 0.5;
      minY = -0.5; maxY = Math.max(1, map.height) - 0.5;
    } else {
      const ps = map.places || [];
      if (ps.length) {
        minX = Math.min(...ps.map((p) => p.x)); maxX = Math.max(...ps.map((p) => p.x));
        minY = Math.min(...ps.map((p) => p.y)); maxY = Math.max(...ps.map((p) => p.y));
      }
      let best = Infinity;
      for (let a = 0; a < ps.length; a++) {
        for (let b = a + 1; b < ps.length; b++) {
          const d = Math.hypot(ps[a].x - ps[b].x, ps[a].y - ps[b].y);
          if (d > 0 && d < best) best = d;
        }
      }
      const extent = Math.max(maxX - minX, maxY - minY);
      unit = isFinite(best) ? Math.max(best, extent / 40) : Math.max(extent, 1);
    }
    const k = U / unit;
    const grid = map.kind === 'grid';
    // Marks (and the margins that hold the labels) grow on a very large
    // map so they stay readable; then they may spill over a cell.
    const M = Math.max(U, (Math.max(maxX - minX, maxY - minY) * k) / 28);
    const pu = M / k;
    const padL = (grid ? 0.75 : 0.8) * pu, padR = 0.8 * pu;
    const padT = (map.flow ? 1.25 : 0.8) * pu, padB = (grid ? 0.75 : 1.0) * pu;
    const w = (maxX - minX + padL + padR) * k, h = (maxY - minY + padT + padB) * k;
    return {
      U, M, w, h, grid,
      x: (x) => (x - minX + padL) * k,
      y: (y) => (maxY - y + padT) * k,
      minX, maxX, minY, maxY,
      robotR: (grid ? 0.3 : 0.24) * M,
      siteR: 0.3 * M,
    };
  }

  // ---- marks (shared by the map and the key) --------------------------------

  // robotMark is a robot's shape at the origin: a solid circle (decided
  // with every predecessor heard), a diamond with a dashed outline (decided
  // with at least one guess), a hollow square with a cross (held).
  function robotMark(kind, id, M, r) {
    const sw = 0.05 * M;
    let body;
    if (kind === 'held') {
      const a = r * 0.85;
      body = `<rect class="rb-body" x="${-a}" y="${-a}" width="${2 * a}" height="${2 * a}" rx="${0.12 * a}" stroke-width="${1.5 * sw}"/>` +
        `<path class="rb-cross" d="M${-a},${-a}L${a},${a}M${a},${-a}L${-a},${a}" stroke-width="${1.2 * sw}"/>`;
    } else if (kind === 'guessed') {
      const d = r * 1.3;
      body = `<path class="rb-body" d="M0,${-d}L${d},0L0,${d}L${-d},0Z" stroke-width="${1.4 * sw}" stroke-dasharray="${0.1 * M} ${0.06 * M}"/>`;
    } else {
      body = `<circle class="rb-body" r="${r}" stroke-width="${sw}"/>`;
    }
    const s = String(id);
    const fs = (s.length > 2 ? 0.62 : s.length > 1 ? 0.8 : 0.95) * r;
    return body + `<text class="rb-id" y="${0.35 * fs}" font-size="${fs}" stroke-width="${0.28 * fs}">${esc(s)}</text>`;
  }

  // A slick: an irregular blob (the same for every slick).
  let blobPath = '';
  function blob(M) {
    if (blobPath && blob.M === M) return blobPath;
    const rs = [0.4, 0.33, 0.42, 0.3, 0.38, 0.34, 0.43, 0.31, 0.39, 0.35];
    const pts = rs.map((r, j) => {
      const a = (j / rs.length) * 2 * Math.PI;
      return [Math.cos(a) * r * M, Math.sin(a) * r * M * 0.8];
    });
    const mid = (p, q) => [(p[0] + q[0]) / 2, (p[1] + q[1]) / 2];
    let d = '';
    for (let j = 0; j < pts.length; j++) {
      const p = pts[j], q = pts[(j + 1) % pts.length];
      const m = mid(p, q);
      if (j === 0) { const m0 = mid(pts[pts.length - 1], p); d += `M${n2(m0[0])},${n2(m0[1])}`; }
      d += `Q${n2(p[0])},${n2(p[1])} ${n2(m[0])},${n2(m[1])}`;
    }
    blob.M = M;
    blobPath = d + 'Z';
    return blobPath;
  }

  function slickMark(M, count) {
    const s = count > 1 ? Math.min(1.2, 1 + 0.1 * (count - 1)) : 1;
    let out = `<path class="slick-body" d="${blob(M)}" transform="scale(${s})" stroke-width="${0.04 * M}"/>`;
    if (count > 1) out += `<text class="slick-n" y="${0.1 * M}" font-size="${0.3 * M}" stroke-width="${0.08 * M}">×${count}</text>`;
    return out;
  }

  // Wear: a light-to-dark ramp (lightness alone carries it, so it reads
  // with any colour vision) through Okabe & Ito's orange, and a disc whose
  // area grows with the wear.
  const RAMP = [[247, 247, 247], [230, 159, 0], [122, 51, 0]];
  function ramp(v) {
    v = Math.max(0, Math.min(1, v || 0));
    const t = v < 0.5 ? v / 0.5 : (v - 0.5) / 0.5;
    const a = RAMP[v < 0.5 ? 0 : 1], b = RAMP[v < 0.5 ? 1 : 2];
    const c = a.map((x, j) => Math.round(x + (b[j] - x) * t));
    return `rgb(${c[0]},${c[1]},${c[2]})`;
  }

  function siteMark(M, R, value, alarm) {
    const v = Math.max(0, Math.min(1, value || 0));
    let out = '';
    if (alarm) {
      const ro = R + 0.1 * M, t = 0.17 * M;
      out += `<circle class="alarm-ring" r="${ro}" stroke-width="${0.09 * M}"/>` +
        `<path class="alarm-notch" d="M0,${-ro - t * 1.6}L${t},${-ro + 0.1 * t}L${-t},${-ro + 0.1 * t}Z"/>`;
    }
    out += `<circle class="site-ring" r="${R}" stroke-width="${0.045 * M}"/>`;
    if (v > 0) out += `<circle class="site-wear" r="${R * 0.92 * Math.sqrt(v)}" fill="${ramp(v)}"/>`;
    return out;
  }

  function arrowLine(x1, y1, x2, y2, M, guessed) {
    const dash = guessed ? ` stroke-dasharray="${0.12 * M} ${0.08 * M}"` : '';
    return `<line class="arrow-halo" x1="${n2(x1)}" y1="${n2(y1)}" x2="${n2(x2)}" y2="${n2(y2)}" stroke-width="${0.13 * M}"/>` +
      `<line class="arrow${guessed ? ' arrow-guessed' : ''}" x1="${n2(x1)}" y1="${n2(y1)}" x2="${n2(x2)}" y2="${n2(y2)}" stroke-width="${0.05 * M}"${dash} marker-end="url(#ah)"/>`;
  }

  function flowArrow(dir, len, M) {
    // Pointing right, then turned to the flow's direction (y up on the map).
    const rot = { E: 0, N: -90, W: 180, S: 90 }[dir];
    if (rot === undefined) return '';
    const h = 0.16 * M;
    return `<g transform="rotate(${rot})"><line class="flow-line" x1="${-len / 2}" y1="0" x2="${len / 2 - h}" y2="0" stroke-width="${0.07 * M}"/>` +
      `<path class="flow-head" d="M${len / 2},0L${len / 2 - 1.6 * h},${-h}L${len / 2 - 1.6 * h},${h}Z"/></g>`;
  }

  // ---- the map's fixed parts ------------------------------------------------

  function drawSite(site) {
    const g = S.geo = geometry(site.map || { kind: 'grid', width: 1, height: 1 });
    const svg = el('map');
    svg.setAttribute('viewBox', `0 0 ${n2(g.w)} ${n2(g.h)}`);
    svg.classList.toggle('grid-map', g.grid);
    svg.classList.toggle('graph-map', !g.grid);
    const M = g.M;
    let bg = `<defs><marker id="ah" viewBox="0 0 10 10" refX="7" refY="5" markerWidth="4" markerHeight="4" orient="auto" markerUnits="strokeWidth">` +
      `<path d="M0,0L10,5L0,10Z" class="arrow-head"/></marker></defs>`;
    const map = site.map || {};
    let labels = '';
    if (g.grid) {
      const W = map.width, H = map.height;
      const x0 = g.x(-0.5), x1 = g.x(W - 0.5), y0 = g.y(H - 0.5), y1 = g.y(-0.5);
      bg += `<rect class="water" x="${x0}" y="${y0}" width="${x1 - x0}" height="${y1 - y0}"/>`;
      const step = Math.max(1, Math.ceil(Math.max(W, H) / 50));
      let d = '';
      for (let x = 0; x <= W; x += step) d += `M${n2(g.x(x - 0.5))},${n2(y0)}V${n2(y1)}`;
      for (let y = 0; y <= H; y += step) d += `M${n2(x0)},${n2(g.y(y - 0.5))}H${n2(x1)}`;
      bg += `<path class="gridline" d="${d}" stroke-width="${0.025 * g.U}"/>`;
      if (map.flow) {
        // Faint chevrons across the water, every few cells.
        const every = Math.max(2, Math.ceil(Math.max(W, H) / 8));
        let ch = '';
        for (let x = every / 2; x < W; x += every) {
          for (let y = every / 2; y < H; y += every) {
            ch += `<g transform="translate(${n2(g.x(x - 0.5))},${n2(g.y(y - 0.5))})">${flowArrow(map.flow, 0.6 * M, 0.5 * M)}</g>`;
          }
        }
        bg += `<g class="flow faint">${ch}</g>`;
        const lx = x1 - 1.1 * M, ly = y0 - 0.62 * M;
        bg += `<g class="flow"><g transform="translate(${n2(lx)},${n2(ly)})">${flowArrow(map.flow, 1.3 * M, 0.8 * M)}</g>` +
          `<text class="flow-label" x="${n2(lx - 0.9 * M)}" y="${n2(ly + 0.12 * M)}" font-size="${0.32 * M}">current ${esc(map.flow)}</text></g>`;
      }
      // Cell numbers along two edges, for reading positions.
      const fs = 0.28 * M;
      let t = '';
      for (let x = 0; x < W; x += step) t += `<text x="${n2(g.x(x))}" y="${n2(y1 + 0.42 * M)}" font-size="${fs}">${x}</text>`;
      for (let y = 0; y < H; y += step) t += `<text x="${n2(x0 - 0.38 * M)}" y="${n2(g.y(y) + fs * 0.35)}" font-size="${fs}">${y}</text>`;
      bg += `<g class="axis">${t}</g>`;
    } else {
      bg += `<rect class="land" x="0" y="0" width="${n2(g.w)}" height="${n2(g.h)}"/>`;
      const ps = map.places || [];
      let d = '';
      for (const [a, b] of map.links || []) {
        if (!ps[a] || !ps[b]) continue;
        d += `M${n2(g.x(ps[a].x))},${n2(g.y(ps[a].y))}L${n2(g.x(ps[b].x))},${n2(g.y(ps[b].y))}`;
      }
      bg += `<path class="road" d="${d}" stroke-width="${0.2 * M}"/><path class="road-mid" d="${d}" stroke-width="${0.025 * M}" stroke-dasharray="${0.12 * M} ${0.1 * M}"/>`;
      const show = ps.length <= 40 ? ' shown' : '';
      let t = '';
      for (const p of ps) {
        t += `<text class="place-label${show}" x="${n2(g.x(p.x))}" y="${n2(g.y(p.y) + g.siteR + 0.36 * M)}" font-size="${0.26 * M}">${esc(p.name)}</text>`;
      }
      labels = `<g class="labels">${t}</g>`;
    }
    // Names above the sites (with a halo), moves and robots above all.
    svg.innerHTML = bg + '<g id="layer-items"></g>' + labels + '<g id="layer-arrows"></g><g id="layer-robots"></g>';
  }

  // ---- one round ------------------------------------------------------------

  const key = (f) => f.epoch + ':' + f.round;
  const same = (a, b) => a.x === b.x && a.y === b.y;
  const actionOf = (r) => r.action || (r.held ? 'stays (held)' : '–');
  const kindOf = (r) => (r.held ? 'held' : r.guessed && r.guessed.length ? 'guessed' : 'decided');

  // Where each robot is drawn, and how big: on its spot, or around it when
  // it shares the spot (graph maps: always beside the site, above it when
  // there is room, so the site's wear and name show).
  function spots(f) {
    const g = S.geo, M = g.M, groups = new Map(), out = new Array(f.robots.length);
    f.robots.forEach((r, j) => {
      const k = r.at.x + ',' + r.at.y;
      if (!groups.has(k)) groups.set(k, []);
      groups.get(k).push(j);
    });
    for (const js of groups.values()) {
      const n = js.length;
      let ring = 0, size = g.robotR, a0 = -Math.PI / 2, step = (2 * Math.PI) / n;
      if (!g.grid) {
        // Up to 6 on an arc over the site (its name is below), more all
        // around it.
        ring = g.siteR + g.robotR * 1.05;
        if (n <= 3) {
          step = 0.9; a0 = -Math.PI / 2 - ((n - 1) / 2) * step;
        } else if (n <= 6) {
          ring = Math.max(ring, ((n - 1) * 2.1 * g.robotR) / Math.PI);
          step = Math.PI / (n - 1); a0 = -Math.PI;
        }
        size = Math.min(g.robotR, Math.max(0.5 * g.robotR, 0.95 * ring * Math.sin(step / 2)));
      } else if (n > 1) {
        // Inside the cell while they fit, smaller the more they are.
        ring = Math.min(0.3, 0.17 + 0.04 * n) * M;
        size = Math.min(0.24 * M, Math.max(0.14 * M, 0.9 * ring * Math.sin(Math.PI / n)));
      }
      js.forEach((j, q) => {
        const r = f.robots[j], a = a0 + q * step;
        out[j] = [g.x(r.at.x) + Math.cos(a) * ring, g.y(r.at.y) + Math.sin(a) * ring, size];
      });
    }
    return out;
  }

  function robotTitle(r, f) {
    const n = f.order.length;
    let t = `robot ${r.robot}: ${actionOf(r)}`;
    t += r.turn >= 0 ? ` (turn ${r.turn + 1} of ${n})` : ' (not in this round)';
    t += `\nat (${r.at.x}, ${r.at.y})` + (same(r.at, r.to) ? ', stays' : ` → (${r.to.x}, ${r.to.y})`);
    if (r.held) t += `\nheld: ${r.why || 'no decision'}`;
    else if (r.guessed.length) t += `\ndecided with a guess for robot${r.guessed.length > 1 ? 's' : ''} ${r.guessed.join(', ')}` + (r.heard.length ? `; heard ${r.heard.join(', ')}` : '');
    else if (r.heard.length) t += `\nheard ${r.heard.join(', ')}`;
    return t;
  }

  function drawMap(f) {
    const g = S.geo, M = g.M;
    // Items.
    let items = '';
    const slicks = new Map();
    for (const it of f.items) {
      if (it.kind === 'slick') {
        const k = it.x + ',' + it.y;
        slicks.set(k, (slicks.get(k) || 0) + 1);
      } else if (it.kind === 'site') {
        const v = it.value || 0;
        const what = `${it.label || 'site'}: expected wear ${Math.round(v * 100)}%` + (it.alarm ? ' — likely due for service' : '');
        items += `<g class="site${it.alarm ? ' alarm' : ''}" transform="translate(${n2(g.x(it.x))},${n2(g.y(it.y))})"><title>${esc(what)}</title>${siteMark(M, g.siteR, v, it.alarm)}</g>`;
      } else {
        const a = 0.15 * M;
        items += `<g class="item" transform="translate(${n2(g.x(it.x))},${n2(g.y(it.y))})"><title>${esc((it.label || it.kind) + (it.value ? ' ' + num(it.value) : ''))}</title><rect x="${-a}" y="${-a}" width="${2 * a}" height="${2 * a}"/></g>`;
      }
    }
    for (const [k, c] of slicks) {
      const [x, y] = k.split(',').map(Number);
      items += `<g class="slick" transform="translate(${n2(g.x(x))},${n2(g.y(y))})"><title>${c > 1 ? c + ' slicks' : 'slick'} at (${x}, ${y})</title>${slickMark(M, c)}</g>`;
    }
    el('layer-items').innerHTML = items;

    // Moves, then robots on top.
    const pos = spots(f);
    const taken = new Set(f.robots.map((o) => o.at.x + ',' + o.at.y));
    let arrows = '', robots = '';
    f.robots.forEach((r, j) => {
      const [cx, cy, size] = pos[j];
      const kind = kindOf(r);
      if (!same(r.at, r.to)) {
        const tx = g.x(r.to.x), ty = g.y(r.to.y);
        const dx = tx - cx, dy = ty - cy, L = Math.hypot(dx, dy);
        // Stop short of whatever is drawn at the target: a site, or a
        // robot on a cell (whose mark would hide the arrowhead).
        const occupied = g.grid && taken.has(r.to.x + ',' + r.to.y);
        const head = g.grid ? (occupied ? g.robotR + 0.04 * M : 0.1 * M) : g.siteR + 0.06 * M;
        const tail = kind === 'guessed' ? size * 1.3 : size;
        if (L > head + tail) {
          const ux = dx / L, uy = dy / L;
          arrows += arrowLine(cx + ux * tail, cy + uy * tail, tx - ux * head, ty - uy * head, M, kind === 'guessed');
        }
      }
      const cls = 'robot' + (r.held ? ' held' : '') + (r.guessed.length ? ' guessed' : '');
      robots += `<g class="${cls}" data-robot="${r.robot}" data-x="${r.at.x}" data-y="${r.at.y}" transform="translate(${n2(cx)},${n2(cy)})">` +
        `<title>${esc(robotTitle(r, f))}</title>${robotMark(kind, r.robot, M, size)}</g>`;
    });
    el('layer-arrows').innerHTML = arrows;
    el('layer-robots').innerHTML = robots;
  }

  // A short list of robot ids (the full one is in the mark's title).
  const list = (ids) => (ids.length <= 5 ? ids.join(', ') : `${ids.slice(0, 4).join(', ')} and ${ids.length - 4} more`);

  function fact(k, v, title) {
    return `<dt>${esc(k)}</dt><dd${title ? ` title="${esc(title)}"` : ''}>${v}</dd>`;
  }

  function epochText(e) {
    const d = new Date(e / 1000);
    if (!e || isNaN(d.getTime())) return String(e);
    return d.toISOString().replace('T', ' ').replace(/\.\d+Z$/, ' UTC');
  }

  function drawPanel(f) {
    const site = S.site;
    el('round').textContent = String(f.round);
    el('round-of').textContent = S.live ? 'newest filed'
      : `of ${S.frames[0].round}–${S.frames[S.frames.length - 1].round}`;
    el('frames-count').textContent = String(S.frames.length);

    const view = S.live ? 'live' : 'replay';
    el('facts').innerHTML =
      fact('fleet', esc(site.fleet || '–')) +
      fact('scenario', `${esc(site.scenario)}, ${site.robots} robot${site.robots === 1 ? '' : 's'}`) +
      fact('view', view) +
      fact('round mode', esc(f.mode || '–')) +
      fact('run (epoch)', esc(epochText(f.epoch)), `epoch ${f.epoch}: the run's start, µs since 1970`) +
      fact('latency', `${num(f.latency_ms)} ms`) +
      fact('stage cost', num(f.stage_cost)) +
      fact('guessing / held', `${f.guessed} / ${f.held}`);

    // Turn order: robot ids in order; guessed turns and held robots marked.
    const byId = new Map(f.robots.map((r) => [r.robot, r]));
    let order = '';
    for (const id of f.order) {
      const r = byId.get(id);
      const kind = r ? kindOf(r) : 'decided';
      const t = r ? robotTitle(r, f) : `robot ${id}`;
      order += `<li class="chip ${kind}" title="${esc(t)}">${id}${kind === 'guessed' ? '<i>?</i>' : kind === 'held' ? '<i>×</i>' : ''}</li>`;
    }
    const out = f.robots.filter((r) => r.turn < 0);
    for (const r of out) order += `<li class="chip out ${kindOf(r)}" title="${esc(robotTitle(r, f))}">${r.robot}<i>–</i></li>`;
    el('order').innerHTML = order || '<li class="muted">no robot in this round</li>';
    const held = f.robots.filter((r) => r.held);
    el('holds').innerHTML = held.length
      ? held.map((r) => `<span class="held-why"><b>robot ${r.robot} held:</b> ${esc(r.why || 'no decision')}</span>`).join('')
      : '<span class="muted">no robot held this round</span>';

    // Robots.
    let rows = '';
    for (const r of f.robots) {
      const kind = kindOf(r);
      let how;
      if (kind === 'held') how = `<span class="tag held">held</span> ${esc(r.why || '')}`;
      else if (kind === 'guessed') how = `<span class="tag guessed">guessed</span> for ${r.guessed.join(', ')}` + (r.heard.length ? `; heard ${list(r.heard)}` : '');
      else if (r.turn === 0) how = 'first turn';
      else if (r.turn > 0 && r.heard.length === r.turn) how = r.turn === 1 ? `heard ${r.heard[0]}` : `heard all ${r.turn} before it`;
      else how = r.heard.length ? `heard ${list(r.heard)}` : '–';
      rows += `<tr class="${kind}" title="${esc(robotTitle(r, f))}"><td><span class="chip ${kind}">${r.robot}</span></td><td>${r.turn >= 0 ? r.turn + 1 : '–'}</td><td>${esc(actionOf(r))}</td><td>${how}</td></tr>`;
    }
    el('robots').tBodies[0].innerHTML = rows;

    // Strips over the last STRIP rounds up to the one shown.
    const end = S.i + 1, from = Math.max(0, end - STRIP);
    const lat = [], cost = [];
    for (let j = from; j < end; j++) { lat.push(S.frames[j].latency_ms); cost.push(S.frames[j].stage_cost); }
    strip('strip-latency', lat, 'lat');
    strip('strip-cost', cost, 'cost');
    el('lat-now').textContent = `${num(f.latency_ms)} ms`;
    el('cost-now').textContent = num(f.stage_cost);
  }

  function strip(id, vs, name) {
    const svg = el(id);
    const W = 200, H = 40, pad = 3;
    let max = 0;
    for (const v of vs) if (isFinite(v) && v > max) max = v;
    el(name + '-max').textContent = vs.length ? `max ${num(max)}${name === 'lat' ? ' ms' : ''}` : '';
    if (!vs.length) { svg.innerHTML = ''; return; }
    if (vs.length === 1) vs = [vs[0], vs[0]]; // one round: a level line
    // Oldest at the left, the round shown at the right edge.
    const x = (j) => (j / (vs.length - 1)) * W;
    const y = (v) => H - pad - (max > 0 ? (Math.max(0, v) / max) * (H - 2 * pad) : 0);
    let pts = '';
    for (let j = 0; j < vs.length; j++) pts += `${n2(x(j))},${n2(y(vs[j]))} `;
    const first = n2(x(0));
    svg.innerHTML = `<path class="strip-area" d="M${first},${H}L${pts.trim().split(' ').join('L')}L${W},${H}Z"/>` +
      `<polyline class="strip-line" points="${pts}" vector-effect="non-scaling-stroke"/>` +
      `<line class="strip-now" x1="${n2(x(vs.length - 1))}" x2="${n2(x(vs.length - 1))}" y1="0" y2="${H}" vector-effect="non-scaling-stroke"/>`;
  }

  function drawSummary(sum) {
    const card = el('summary-card');
    if (S.live || sum == null || typeof sum !== 'object') { card.hidden = true; return; }
    const show = (v) => {
      if (v == null) return '–';
      if (typeof v === 'number') return esc(num(v));
      if (Array.isArray(v)) return v.length ? v.map((x) => `<div class="sub">${show(x)}</div>`).join('') : '–';
      if (typeof v === 'object') return Object.keys(v).map((k) => `${esc(k.replace(/_/g, ' '))} <b>${show(v[k])}</b>`).join(', ');
      return esc(v);
    };
    el('summary').innerHTML = Object.keys(sum).map((k) => `<tr><th>${esc(k.replace(/_/g, ' '))}</th><td>${show(sum[k])}</td></tr>`).join('');
    card.hidden = false;
  }

  // ---- the key ----------------------------------------------------------------

  function drawLegend(site) {
    const M = 24, r = 0.3 * M;
    const box = (inner, vb) => `<svg viewBox="${vb || `${-M / 2} ${-M / 2} ${M} ${M}`}" aria-hidden="true">${inner}</svg>`;
    const rows = [];
    const add = (svg, text) => rows.push(`<li>${svg}<span>${text}</span></li>`);
    add(box(`<g class="lg-robot">${robotMark('decided', 3, M, r)}</g>`), 'robot (its number), decided with every earlier turn heard');
    add(box(`<g class="lg-robot guessed">${robotMark('guessed', 3, M, r)}</g>`), 'robot that decided with a <b>guess</b> for an earlier turn (diamond, dashed)');
    add(box(`<g class="lg-robot held">${robotMark('held', 3, M, r)}</g>`), 'robot <b>held</b>: no decision this round, it stays (hollow, crossed)');
    const arrowDefs = `<defs><marker id="ah-k" viewBox="0 0 10 10" refX="7" refY="5" markerWidth="4" markerHeight="4" orient="auto" markerUnits="strokeWidth"><path d="M0,0L10,5L0,10Z" class="arrow-head"/></marker></defs>`;
    const lgArrow = (g) => box(arrowDefs + arrowLine(-M * 0.6, 0, M * 0.6, 0, M, g).replace(/url\(#ah\)/g, 'url(#ah-k)'), `${-M * 0.75} ${-M / 2} ${M * 1.5} ${M}`);
    add(lgArrow(false), 'its move this round (no arrow: it stays)');
    add(lgArrow(true), 'a move decided on a guess');
    const map = site.map || {};
    if (map.kind === 'grid') {
      add(box(`<g class="slick">${slickMark(M, 1)}</g>`), 'oil slick (×n: several in one cell)');
      if (map.flow) add(box(`<g class="flow">${flowArrow('E', M * 0.9, M * 0.8)}</g>`), `current: slicks drift mostly ${({ N: 'north', S: 'south', E: 'east', W: 'west' })[map.flow] || map.flow}`);
    } else {
      const sm = (v, a) => box(`<g class="site${a ? ' alarm' : ''}">${siteMark(M, 0.3 * M, v, a)}</g>`, `${-M * 0.6} ${-M * 0.6} ${M * 1.2} ${M * 1.2}`);
      add(`<span class="swatches">${sm(0.1)}${sm(0.5)}${sm(0.95)}</span>`, 'site: the disc grows and darkens with the expected wear (0 → 100%)');
      add(sm(0.7, true), 'site likely due for service: thick ring with a notch');
      add(box(`<path class="road" d="M${-M / 2},0H${M / 2}" stroke-width="${0.2 * M}"/><path class="road-mid" d="M${-M / 2},0H${M / 2}" stroke-width="1" stroke-dasharray="3 2"/>`), 'road between sites');
    }
    el('legend').innerHTML = `<ul class="legend">${rows.join('')}</ul>` +
      `<p class="muted small">Turn order: <span class="chip decided">1</span> heard all, <span class="chip guessed">2<i>?</i></span> guessed, <span class="chip held">3<i>×</i></span> held, <span class="chip out decided">4<i>–</i></span> not in the round. Hover a mark for details.</p>`;
  }

  // ---- drawing schedule ---------------------------------------------------------

  function scheduleDraw() {
    S.dirty = true;
    if (!S.pending) { S.pending = true; requestAnimationFrame(pump); }
  }

  function pump(now) {
    S.pending = false;
    if (S.playing) advance(now);
    if (S.dirty) { S.dirty = false; draw(); }
    if (S.playing) { S.pending = true; requestAnimationFrame(pump); }
  }

  function draw() {
    const f = S.frames[S.i];
    if (!f) return;
    const k = key(f);
    if (k !== S.drawnKey) {
      drawMap(f);
      drawPanel(f);
      S.drawnKey = k;
    }
    el('empty').hidden = true;
    if (!S.live) {
      el('scrub').value = String(S.i);
      if (document.activeElement !== el('jump-round')) el('jump-round').value = String(f.round);
    }
    if (document.body.dataset.ready !== '1') {
      document.body.dataset.ready = '1';
      window.batonReadyMs = performance.now();
    }
  }

  // ---- replay -------------------------------------------------------------------

  function setIndex(i) {
    const n = S.frames.length;
    if (!n) return;
    S.i = Math.max(0, Math.min(n - 1, i));
    scheduleDraw();
  }

  function play() {
    if (S.live || !S.frames.length) return;
    if (S.i >= S.frames.length - 1) S.i = 0; // from the start again
    S.speed = Number(el('speed').value) || 5;
    S.playing = true; S.acc = 0; S.last = performance.now();
    playButtons();
    scheduleDraw();
  }

  function pause() {
    S.playing = false;
    playButtons();
  }

  function playButtons() {
    el('play').disabled = S.playing;
    el('pause').disabled = !S.playing;
    document.body.classList.toggle('playing', S.playing);
  }

  function advance(now) {
    const dt = Math.min(0.25, Math.max(0, (now - S.last) / 1000));
    S.last = now;
    S.acc += dt * S.speed;
    const steps = Math.floor(S.acc);
    if (steps > 0) {
      S.acc -= steps;
      S.i = Math.min(S.frames.length - 1, S.i + steps);
      S.dirty = true;
      if (S.i >= S.frames.length - 1) pause();
    }
  }

  function indexOfRound(round) {
    const fs = S.frames;
    let best = -1;
    for (let j = 0; j < fs.length; j++) {
      if (fs[j].round === round) return j;
      if (best < 0 && fs[j].round > round) best = j;
    }
    return best >= 0 ? best : fs.length - 1;
  }

  function wireControls() {
    el('controls').hidden = false;
    el('step-back').addEventListener('click', () => { pause(); setIndex(S.i - 1); });
    el('step-forward').addEventListener('click', () => { pause(); setIndex(S.i + 1); });
    el('play').addEventListener('click', play);
    el('pause').addEventListener('click', pause);
    el('speed').addEventListener('change', () => { S.speed = Number(el('speed').value) || 1; });
    S.speed = Number(el('speed').value) || 5;
    el('jump-form').addEventListener('submit', (e) => {
      e.preventDefault();
      const v = parseInt(el('jump-round').value, 10);
      if (!isNaN(v)) { pause(); setIndex(indexOfRound(v)); el('jump-round').blur(); }
    });
    const scrub = el('scrub');
    scrub.max = String(Math.max(0, S.frames.length - 1));
    scrub.addEventListener('input', () => { pause(); setIndex(Number(scrub.value)); });
    document.addEventListener('keydown', (e) => {
      const t = e.target;
      if (t && /^(INPUT|SELECT|TEXTAREA|BUTTON)$/.test(t.tagName)) return;
      if (e.key === 'ArrowLeft') { pause(); setIndex(S.i - 1); e.preventDefault(); }
      else if (e.key === 'ArrowRight') { pause(); setIndex(S.i + 1); e.preventDefault(); }
      else if (e.key === ' ') { (S.playing ? pause : play)(); e.preventDefault(); }
    });
    playButtons();
  }

  function startReplay(site, frames) {
    S.live = false;
    setSite(site);
    S.frames = Array.isArray(frames) ? frames : [];
    el('frames-count').textContent = String(S.frames.length);
    wireControls();
    drawSummary(site.summary);
    if (!S.frames.length) { el('empty').textContent = 'the log has no rounds to show'; return; }
    setIndex(0);
  }

  // ---- live ---------------------------------------------------------------------

  const newer = (a, b) => a.epoch > b.epoch || (a.epoch === b.epoch && a.round > b.round);

  // addFrames merges frames in (epoch, round) order, once each; the newest
  // is the one shown.
  function addFrames(list) {
    if (!Array.isArray(list) || !list.length) return;
    const fs = S.frames;
    for (const f of list) {
      if (!f || !Array.isArray(f.robots)) continue;
      f.order = f.order || []; f.items = f.items || [];
      for (const r of f.robots) { r.heard = r.heard || []; r.guessed = r.guessed || []; }
      const last = fs[fs.length - 1];
      if (!last || newer(f, last)) { fs.push(f); continue; }
      let j = fs.length - 1;
      while (j >= 0 && newer(fs[j], f)) j--;
      if (j >= 0 && key(fs[j]) === key(f)) continue; // have it
      fs.splice(j + 1, 0, f);
    }
    if (fs.length > LIVE_KEEP) fs.splice(0, fs.length - LIVE_KEEP);
    S.i = fs.length - 1;
    el('frames-count').textContent = String(fs.length);
    scheduleDraw();
  }

  function setConn(text, ok) {
    const c = el('conn');
    c.hidden = false;
    c.textContent = text;
    c.classList.toggle('ok', !!ok);
  }

  let catching = false;
  async function catchUp() {
    if (catching) return;
    catching = true;
    try {
      const last = S.frames[S.frames.length - 1];
      const url = '/view/frames.json' + (last ? `?since=${last.round}` : '');
      addFrames(await getJSON(url));
    } catch (e) {
      setConn('cannot reach the coordinator', false);
    } finally {
      catching = false;
    }
  }

  function connect() {
    const es = new EventSource('/view/events');
    es.addEventListener('open', () => { setConn('connected', true); catchUp(); });
    es.addEventListener('frame', (e) => {
      try { addFrames([JSON.parse(e.data)]); } catch (err) { /* a torn event: the next catch-up fills it */ }
    });
    es.addEventListener('error', () => {
      if (es.readyState === EventSource.CLOSED) {
        // The browser gave up (the coordinator answered with an error):
        // start over after a pause.
        setConn('disconnected, retrying…', false);
        es.close();
        setTimeout(connect, 3000);
      } else {
        setConn('reconnecting…', false);
      }
    });
  }

  async function startLive(site) {
    S.live = true;
    setSite(site);
    try { addFrames(await getJSON('/view/frames.json')); } catch (e) { /* the stream's first catch-up retries */ }
    connect();
  }

  // ---- start --------------------------------------------------------------------

  function setSite(site) {
    S.site = site;
    const live = site.mode === 'live' && S.live;
    el('view-mode').textContent = live ? 'live' : 'replay';
    el('view-mode').className = 'badge ' + (live ? 'live' : 'replay');
    el('source').textContent = site.source ? site.source : '';
    el('source').title = site.source || '';
    document.title = `Baton · ${site.fleet || 'fleet'} · ${live ? 'live' : 'replay'}`;
    drawSite(site);
    drawLegend(site);
  }

  async function getJSON(url) {
    const res = await fetch(url, { cache: 'no-store' });
    if (!res.ok) throw new Error(`${url}: ${res.status}`);
    return res.json();
  }

  async function boot() {
    const inline = document.getElementById('baton-data');
    try {
      if (inline) {
        const d = JSON.parse(inline.textContent);
        startReplay(Object.assign({}, d.site, { mode: 'replay' }), d.frames);
        return;
      }
      const site = await getJSON('/view/site.json');
      if (site.mode === 'live') await startLive(site);
      else startReplay(site, await getJSON('/view/frames.json'));
    } catch (e) {
      el('empty').textContent = `cannot load the fleet: ${e.message}`;
      el('empty').classList.add('error');
    }
  }

  if (document.readyState === 'loading') document.addEventListener('DOMContentLoaded', boot);
  else boot();
})();
