/*
 * Consensor's web page. Every figure comes from the JSON API of the server that served the page,
 * fetched under the token kept in this tab's sessionStorage (or none, where the server lets anyone
 * read). Charts are Chart.js line charts: bands are fills between two series, set-aside readings
 * are point series whose shape and colour name the rule that caught them.
 *
 * No data is written into the document as HTML: text goes in with textContent, so a station name
 * or a review note can never become markup.
 */
(function () {
  'use strict';

  const TOKEN_KEY = 'consensor.token';
  const MINUTE = 60000;
  const HOUR = 60 * MINUTE;
  const DAY = 24 * HOUR;
  /** The most set-aside readings drawn in one chart; the review queue lists them all. */
  const MAX_MARKERS = 5000;
  /** The most rows a set-aside table shows before "Show more". */
  const TABLE_ROWS = 50;

  const body = document.body;
  const view = body.dataset.view;
  const subject = body.dataset.subject || '';
  const publicRead = body.dataset.publicRead === 'true';
  // The server's clock at render time: "how long ago" is measured on it, not on the viewer's.
  const clockOffset = Number(body.dataset.now) - Date.now();
  const serverNow = () => Date.now() + clockOffset;

  // The colour-blind-safe palette of Okabe & Ito (2008), "Color Universal Design".
  const PALETTE = {
    blue: '#0072B2',
    sky: '#56B4E9',
    green: '#009E73',
    vermillion: '#D55E00',
    orange: '#E69F00',
    purple: '#CC79A7',
    black: '#000000',
    grey: '#595959',
  };

  // Each rule has its own shape (a Chart.js point style) as well as its own colour, so that the
  // markers differ for readers who cannot tell the colours apart. `symbol` is the same shape in
  // text, for tables and the legend of the tables.
  const RULES = {
    missing_value: { label: 'no value', shape: 'cross', colour: PALETTE.grey, symbol: '+' },
    missing_code: { label: 'missing-data code', shape: 'crossRot', colour: PALETTE.black, symbol: '×' },
    out_of_range: { label: 'out of range', shape: 'rectRot', colour: PALETTE.orange, symbol: '◆' },
    flat_line: { label: 'flat line', shape: 'star', colour: PALETTE.purple, symbol: '✳' },
    step: { label: 'step', shape: 'rect', colour: PALETTE.green, symbol: '■' },
    far_from_consensus: { label: 'far from consensus', shape: 'triangle', colour: PALETTE.vermillion, symbol: '▲' },
  };
  const RULE_ORDER = Object.keys(RULES);

  const STATUS_TEXT = {
    ok: 'ok',
    few_stations: 'few stations: not cross-checked',
    no_data: 'no data',
  };

  // ---------------------------------------------------------------------------------------------
  // Small helpers
  // ---------------------------------------------------------------------------------------------

  const $ = (selector) => document.querySelector(selector);

  /** An element with attributes and children (strings become text nodes). */
  function el(tag, attributes, ...children) {
    const node = document.createElement(tag);
    for (const [name, value] of Object.entries(attributes || {})) {
      if (value === undefined || value === null || value === false) continue;
      if (name === 'class') node.className = value;
      else if (name === 'text') node.textContent = value;
      else node.setAttribute(name, value === true ? '' : String(value));
    }
    for (const child of children.flat()) {
      if (child === undefined || child === null || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  /** A table head of one row of column headers. */
  function tableHead(columns) {
    return el('thead', {}, el('tr', {}, columns.map((text) => el('th', { scope: 'col', text }))));
  }

  function query(params) {
    const search = new URLSearchParams();
    for (const [name, value] of Object.entries(params)) {
      if (value !== undefined && value !== null && value !== '') search.set(name, String(value));
    }
    return search.toString();
  }

  const sleep = (ms) => new Promise((resolve) => setTimeout(resolve, ms));

  /** RFC 3339 in UTC, whole seconds, as the API takes it. */
  function rfc3339(ms) {
    return new Date(ms).toISOString().replace(/\.\d{3}Z$/, 'Z');
  }

  /** `2026-06-01 07:10` (UTC). */
  function timeText(ms) {
    const text = new Date(ms).toISOString();
    return text.slice(0, 10) + ' ' + text.slice(11, 16);
  }

  /** `07:10` (UTC). */
  function clockText(ms) {
    return new Date(ms).toISOString().slice(11, 16);
  }

  function durationText(ms) {
    const minutes = Math.max(0, Math.round(ms / MINUTE));
    if (minutes < 60) return minutes + ' min';
    if (minutes < 48 * 60) {
      const hours = Math.floor(minutes / 60);
      const rest = minutes % 60;
      return rest ? hours + ' h ' + rest + ' min' : hours + ' h';
    }
    return Math.round(minutes / (24 * 60)) + ' days';
  }

  /** "between `since` and `until` ago", as `20–30 min ago` when both are under an hour. */
  function agoRangeText(since, until) {
    if (until < HOUR) return Math.round(since / MINUTE) + '–' + Math.round(until / MINUTE) + ' min ago';
    return durationText(since) + ' to ' + durationText(until) + ' ago';
  }

  function agoText(ms) {
    const elapsed = serverNow() - ms;
    if (elapsed < MINUTE) return 'less than a minute ago';
    return durationText(elapsed) + ' ago';
  }

  /** A number with at most three decimals, or a dash for null. */
  function number(value) {
    if (value === null || value === undefined || !Number.isFinite(value)) return '—';
    return String(Number(value.toFixed(3)));
  }

  function signed(value) {
    const text = number(value);
    return value > 0 ? '+' + text : text;
  }

  function withUnit(value, unit) {
    return value === null || value === undefined ? '—' : number(value) + ' ' + unit;
  }

  function median(values) {
    const sorted = values.filter(Number.isFinite).sort((a, b) => a - b);
    if (!sorted.length) return null;
    const middle = Math.floor(sorted.length / 2);
    return sorted.length % 2 ? sorted[middle] : (sorted[middle - 1] + sorted[middle]) / 2;
  }

  /** The API's interval names (`10m`, `1h`) in milliseconds. */
  function intervalMs(name) {
    const match = /^(\d+)(m|h)$/.exec(name || '');
    if (!match) return 10 * MINUTE;
    return Number(match[1]) * (match[2] === 'h' ? HOUR : MINUTE);
  }

  function alpha(hex, opacity) {
    const value = parseInt(hex.slice(1), 16);
    return 'rgba(' + (value >> 16) + ',' + ((value >> 8) & 255) + ',' + (value & 255) + ',' + opacity + ')';
  }

  function ruleInfo(rule) {
    return RULES[rule] || { label: rule, shape: 'circle', colour: PALETTE.black, symbol: '●' };
  }

  /** The rule's symbol (hidden from screen readers) and its name. */
  function ruleCell(rule) {
    const info = ruleInfo(rule);
    return el('span', { class: 'rule', 'data-rule': rule },
      el('span', { class: 'rule-symbol', 'aria-hidden': 'true', text: info.symbol }),
      ' ' + info.label);
  }

  function readingValueText(item) {
    if (item.value === null || item.value === undefined) return 'no value';
    let text = number(item.value) + ' ' + (item.unit || '');
    if (item.unit_as_sent && item.unit_as_sent !== item.unit && item.value_as_sent !== null) {
      text += ' (sent as ' + number(item.value_as_sent) + ' ' + item.unit_as_sent + ')';
    }
    return text;
  }

  // ---------------------------------------------------------------------------------------------
  // The token and the API
  // ---------------------------------------------------------------------------------------------

  function token() {
    try {
      return sessionStorage.getItem(TOKEN_KEY) || '';
    } catch (error) {
      return '';
    }
  }

  const canRead = () => publicRead || token() !== '';

  class ApiProblem extends Error {
    constructor(status, data) {
      super((data && data.message) || 'the server answered ' + status);
      this.status = status;
      this.data = data;
    }
  }

  async function api(path, options) {
    const settings = options || {};
    const headers = { Accept: 'application/json' };
    const secret = token();
    if (secret) headers.Authorization = 'Bearer ' + secret;
    let requestBody;
    if (settings.body !== undefined) {
      headers['Content-Type'] = 'application/json';
      requestBody = JSON.stringify(settings.body);
    }
    const response = await fetch(path, {
      method: settings.method || 'GET',
      headers,
      body: requestBody,
      credentials: 'omit',
      cache: 'no-store',
    });
    const text = await response.text();
    let data = null;
    if (text) {
      try {
        data = JSON.parse(text);
      } catch (error) {
        data = { message: text };
      }
    }
    if (!response.ok) throw new ApiProblem(response.status, data);
    return data;
  }

  let quantityCache = null;
  /** The quantity table in force, by id. */
  async function quantityTable() {
    if (!quantityCache) {
      const table = await api('/v1/quantities');
      quantityCache = new Map(table.quantities.map((quantity) => [quantity.id, quantity]));
    }
    return quantityCache;
  }

  /** Every set-aside record matching `filter`, page by page, up to `limit` records. */
  async function setAsideAll(filter, limit) {
    const items = [];
    let cursor = null;
    do {
      const page = await api('/v1/set-aside?' + query(Object.assign({}, filter, { limit: 1000, cursor })));
      items.push(...page.items);
      cursor = page.next_cursor;
    } while (cursor && items.length < limit);
    return { items: items.slice(0, limit), complete: !cursor && items.length <= limit };
  }

  function problemText(error) {
    if (error instanceof ApiProblem) {
      if (error.status === 401) {
        return 'The server needs a valid token (401): ' + error.message + '. Enter one above.';
      }
      if (error.status === 403) return 'This token may not do that (403): ' + error.message + '.';
      return 'The server answered ' + error.status + ': ' + error.message + '.';
    }
    return 'Could not reach the server: ' + error.message + '.';
  }

  function setViewState(text, kind) {
    const state = $('#view-state');
    if (!state) return;
    state.textContent = text;
    state.dataset.kind = kind || 'info';
  }

  function needToken() {
    setViewState('This server needs an access token to show data: enter one above.', 'warn');
  }

  function setupToken(reload) {
    const form = $('#token-form');
    const input = $('#token-input');
    const state = $('#token-state');
    const show = () => {
      if (token()) state.textContent = 'A token is in use in this tab.';
      else if (publicRead) state.textContent = 'No token: anyone may read here; deciding reviews needs one.';
      else state.textContent = 'No token: this server needs one to show data.';
      body.dataset.token = token() ? 'set' : 'none';
    };
    form.addEventListener('submit', (event) => {
      event.preventDefault();
      const value = input.value.trim();
      if (!value) {
        state.textContent = 'Type or paste a token first.';
        input.focus();
        return;
      }
      try {
        sessionStorage.setItem(TOKEN_KEY, value);
      } catch (error) {
        state.textContent = 'This browser does not allow the tab to keep a token.';
        return;
      }
      input.value = '';
      show();
      reload();
    });
    $('#token-forget').addEventListener('click', () => {
      try {
        sessionStorage.removeItem(TOKEN_KEY);
      } catch (error) {
        // Nothing was kept.
      }
      input.value = '';
      show();
      reload();
    });
    show();
  }

  // ---------------------------------------------------------------------------------------------
  // Charts
  // ---------------------------------------------------------------------------------------------

  const TIME_STEPS = [10 * MINUTE, 30 * MINUTE, HOUR, 2 * HOUR, 3 * HOUR, 6 * HOUR, 12 * HOUR, DAY, 2 * DAY, 7 * DAY];

  /** A linear x axis in epoch milliseconds with ticks on whole UTC steps. */
  function timeAxis(fromMs, toMs) {
    const span = Math.max(toMs - fromMs, MINUTE);
    const step = TIME_STEPS.find((candidate) => span / candidate <= 8) || 7 * DAY;
    return {
      type: 'linear',
      min: fromMs,
      max: toMs,
      title: { display: true, text: 'time (UTC)' },
      // Ticks on whole multiples of the step (UTC hours, days), wherever the span starts.
      afterBuildTicks: (axis) => {
        const ticks = [];
        for (let value = Math.ceil(fromMs / step) * step; value <= toMs; value += step) ticks.push({ value });
        axis.ticks = ticks;
      },
      ticks: {
        stepSize: step,
        maxRotation: 0,
        autoSkip: true,
        callback: (value) => {
          const text = new Date(value).toISOString();
          if (step >= DAY || text.slice(11, 16) === '00:00') return text.slice(5, 10) + (step >= DAY ? '' : ' 00:00');
          return text.slice(11, 16);
        },
      },
    };
  }

  /** The part of [fromMs, toMs] that holds data (the times given), widened to whole intervals: a
   * span whose data begin late or end early is not drawn mostly empty. */
  function dataSpan(fromMs, toMs, length, times) {
    const finite = times.filter(Number.isFinite);
    if (!finite.length) return [fromMs, toMs];
    const first = Math.floor(Math.min(...finite) / length) * length;
    const last = Math.ceil(Math.max(...finite) / length) * length;
    const from = Math.max(fromMs, first);
    const to = Math.min(toMs, last);
    return to > from ? [from, to] : [fromMs, toMs];
  }

  /** A round step (1, 2 or 5 times a power of ten) near `raw`. */
  function roundStep(raw) {
    const power = Math.pow(10, Math.floor(Math.log10(raw)));
    const fraction = raw / power;
    return (fraction < 1.5 ? 1 : fraction < 3.5 ? 2 : fraction < 7.5 ? 5 : 10) * power;
  }

  /** Axis bounds around `values` on round numbers, with a small margin so that markers at the
   * extremes are not cut; never below `floor` or above `ceiling` when no value is (a quantity's
   * range limits, such as 0 for a concentration or 100 for relative humidity). */
  function bounds(values, floor, ceiling) {
    const finite = values.filter(Number.isFinite);
    if (!finite.length) return { min: 0, max: 1, step: 0.2 };
    let min = Math.min(...finite);
    let max = Math.max(...finite);
    if (max - min < 1e-9) {
      const pad = Math.max(Math.abs(max) * 0.05, 0.5);
      min -= pad;
      max += pad;
    }
    const step = roundStep((max - min) / 5);
    const margin = (max - min) * 0.03;
    let low = Math.floor((min - margin) / step) * step;
    let high = Math.ceil((max + margin) / step) * step;
    if (Number.isFinite(floor) && min >= floor && low < floor) low = floor;
    if (Number.isFinite(ceiling) && max <= ceiling && high > ceiling) high = ceiling;
    return { min: low, max: high, step };
  }

  /** The legend: one entry per visible series, lines drawn as lines, bands as boxes, markers in
   * their own shape; the lower edges of the bands are not listed. */
  function legendOptions() {
    return {
      position: 'bottom',
      labels: {
        usePointStyle: true,
        // In the order of the series, not their drawing order.
        sort: (a, b) => a.datasetIndex - b.datasetIndex,
        generateLabels(chart) {
          const items = Chart.defaults.plugins.legend.labels.generateLabels(chart);
          return items
            .filter((item) => !chart.data.datasets[item.datasetIndex].helper)
            .map((item) => {
              const dataset = chart.data.datasets[item.datasetIndex];
              if (dataset.legendStyle) item.pointStyle = dataset.legendStyle;
              return item;
            });
        },
      },
    };
  }

  /** Splits a long sentence into tooltip lines. */
  function wrap(text, width) {
    const lines = [];
    let line = '';
    for (const word of String(text).split(' ')) {
      if (line && (line + ' ' + word).length > width) {
        lines.push(line);
        line = word;
      } else {
        line = line ? line + ' ' + word : word;
      }
    }
    if (line) lines.push(line);
    return lines;
  }

  function markerLines(item) {
    const info = ruleInfo(item.rule);
    return [
      item.station + ': ' + readingValueText(item) + ', set aside (' + info.label + '; review ' + item.review.state + ')',
      ...wrap(item.reason, 70),
    ];
  }

  /** One dataset per rule present, each reading at its observation time. A value off the chart
   * (a missing-data code, no value at all, or one outside the plausible range) is pinned to the
   * nearer edge; its tooltip still gives the value. */
  function markerDatasets(markers, limits, highlightId) {
    const datasets = [];
    // Smaller markers where they are many, so that a long run of them stays readable.
    const radius = markers.length > 100 ? 4 : 7;
    for (const rule of RULE_ORDER) {
      const items = markers.filter((item) => item.rule === rule);
      if (!items.length) continue;
      const info = ruleInfo(rule);
      datasets.push({
        label: 'Set aside: ' + info.label,
        role: 'set-aside',
        rule,
        showLine: false,
        data: items.map((item) => {
          let y = item.value;
          let pinned = false;
          if (y === null || y === undefined || y < limits.min) {
            y = limits.min;
            pinned = item.value !== null && item.value !== undefined;
          } else if (y > limits.max) {
            y = limits.max;
            pinned = true;
          }
          return { x: Date.parse(item.observed_at), y, item, pinned };
        }),
        pointStyle: info.shape,
        pointRadius: (context) => (context.raw && context.raw.item && context.raw.item.reading_id === highlightId ? 12 : radius),
        pointHoverRadius: radius + 3,
        pointBorderWidth: 2,
        borderColor: info.colour,
        backgroundColor: alpha(info.colour, 0.45),
        legendStyle: info.shape,
        order: -1,
      });
    }
    return datasets;
  }

  /** The upper range limit of a quantity, where it is one for values (not a rate per minute). */
  function rangeCeiling(spec) {
    return spec && !spec.range_per_minute ? spec.range_max : undefined;
  }

  /** Which plausible range a quantity's markers may stretch the y axis to. */
  function plausible(spec, value) {
    if (!Number.isFinite(value)) return false;
    if (!spec) return true;
    const max = spec.range_per_minute ? Infinity : spec.range_max;
    return value >= spec.range_min && value <= max;
  }

  /** The area chart of one quantity: the median, its range and 95 % interval as bands, the
   * unchecked mean of all stations, and the set-aside readings as markers. */
  function consensusChart(canvas, options) {
    const { series, markers, spec, fromMs, toMs, highlightId, title } = options;
    const unit = series.unit;
    const length = intervalMs(series.interval);
    // Each interval at its middle; a missing interval breaks the lines instead of bridging them.
    const rows = [];
    let previous = null;
    for (const point of series.points) {
      const start = Date.parse(point.start);
      if (previous !== null && start - previous > length) rows.push({ x: previous + length, p: null });
      rows.push({ x: start + length / 2, p: point });
      previous = start;
    }
    const pick = (key) => rows.map((row) => ({ x: row.x, y: row.p ? row.p[key] : null, p: row.p }));
    const consensusValues = [];
    for (const point of series.points) {
      for (const key of ['median', 'median_low', 'median_high', 'ci95_low', 'ci95_high', 'mean_all']) {
        if (point[key] !== null) consensusValues.push(point[key]);
      }
    }
    const markerValues = markers.map((item) => item.value).filter((value) => plausible(spec, value));
    const limits = bounds(consensusValues.concat(markerValues), spec ? spec.range_min : undefined, rangeCeiling(spec));
    const [axisFrom, axisTo] = dataSpan(fromMs, toMs, length,
      series.points.flatMap((point) => [Date.parse(point.start), Date.parse(point.end)])
        .concat(markers.map((item) => Date.parse(item.observed_at))));
    const few = series.points.length <= 48;
    const datasets = [
      {
        label: '95 % interval of the median',
        role: 'ci95',
        data: pick('ci95_high'),
        fill: '+1',
        backgroundColor: alpha(PALETTE.sky, 0.3),
        borderColor: alpha(PALETTE.sky, 0.9),
        borderWidth: 1,
        pointRadius: 0,
        legendStyle: 'rect',
        order: 3,
      },
      { label: 'ci95_low', role: 'ci95-low', helper: true, data: pick('ci95_low'), fill: false, borderColor: alpha(PALETTE.sky, 0.9), borderWidth: 1, pointRadius: 0, order: 3 },
      {
        label: 'Median range (median_low to median_high)',
        role: 'median-range',
        data: pick('median_high'),
        fill: '+1',
        backgroundColor: alpha(PALETTE.blue, 0.35),
        borderColor: alpha(PALETTE.blue, 0.6),
        borderWidth: 1,
        pointRadius: 0,
        legendStyle: 'rect',
        order: 2,
      },
      { label: 'median_low', role: 'median-range-low', helper: true, data: pick('median_low'), fill: false, borderColor: alpha(PALETTE.blue, 0.6), borderWidth: 1, pointRadius: 0, order: 2 },
      {
        label: 'Median',
        role: 'median',
        data: pick('median'),
        borderColor: PALETTE.blue,
        backgroundColor: PALETTE.blue,
        borderWidth: 2.5,
        pointRadius: few ? 3 : 0,
        legendStyle: 'line',
        order: 1,
      },
      {
        label: 'Mean of all stations, unchecked',
        role: 'mean-all',
        data: pick('mean_all'),
        borderColor: PALETTE.purple,
        backgroundColor: PALETTE.purple,
        borderDash: [7, 4],
        borderWidth: 2,
        pointRadius: few ? 3 : 0,
        pointStyle: 'rectRounded',
        legendStyle: 'line',
        order: 1,
      },
      ...markerDatasets(markers, limits, highlightId),
    ];
    const chart = draw(canvas, {
      type: 'line',
      data: { datasets },
      options: baseOptions(axisFrom, axisTo, unit, limits, (context) => {
        const raw = context.raw;
        const dataset = context.dataset;
        if (raw.item) {
          const lines = markerLines(raw.item);
          if (raw.pinned) lines.push('(drawn at the edge: the value is off the chart)');
          return lines;
        }
        if (!raw.p) return '';
        if (dataset.role === 'ci95') return '95 % interval of the median: ' + number(raw.p.ci95_low) + ' to ' + number(raw.p.ci95_high) + ' ' + unit;
        if (dataset.role === 'median-range') return 'Median range: ' + number(raw.p.median_low) + ' to ' + number(raw.p.median_high) + ' ' + unit;
        if (dataset.role === 'median') return 'Median: ' + withUnit(raw.p.median, unit) + ' (' + raw.p.stations_used + ' stations used, ' + raw.p.stations_set_aside + ' set aside; ' + (STATUS_TEXT[raw.p.status] || raw.p.status) + ')';
        return dataset.label + ': ' + withUnit(raw.y, unit);
      }, (items) => {
        if (!items.length) return '';
        const raw = items[0].raw;
        if (raw.item) return timeText(raw.x) + ' UTC';
        if (raw.p) return 'Interval ' + timeText(Date.parse(raw.p.start)) + '–' + clockText(Date.parse(raw.p.end)) + ' UTC';
        return '';
      }),
    });
    const medians = series.points.map((point) => point.median).filter(Number.isFinite);
    const described = title + ', ' + timeText(axisFrom) + ' to ' + timeText(axisTo) + ' UTC: ' +
      series.points.length + ' intervals' +
      (medians.length ? ', median from ' + number(Math.min(...medians)) + ' to ' + number(Math.max(...medians)) + ' ' + unit : '') +
      '; ' + markers.length + ' set-aside readings shown as markers.' +
      ' Focus the chart and use the arrow keys to step through ' + (markers.length ? 'the set-aside readings.' : 'the intervals.');
    canvas.setAttribute('aria-label', described);
    return chart;
  }

  /** Draws (or redraws) a chart on `canvas` and marks it ready for whoever waits on it. */
  function draw(canvas, config) {
    const previous = Chart.getChart(canvas);
    if (previous) previous.destroy();
    const chart = new Chart(canvas, config);
    keyboardSteps(canvas);
    canvas.dataset.draws = String(Number(canvas.dataset.draws || '0') + 1);
    canvas.dataset.state = 'ready';
    return chart;
  }

  /** Arrow keys on a focused chart step the tooltip through its markers (or, with none, through
   * the points of its first line), so the chart's details can be read without a pointer. */
  function keyboardSteps(canvas) {
    if (canvas.dataset.keys === 'on') return;
    canvas.dataset.keys = 'on';
    canvas.addEventListener('keydown', (event) => {
      const chart = Chart.getChart(canvas);
      if (!chart) return;
      const keys = ['ArrowRight', 'ArrowLeft', 'Home', 'End', 'Escape'];
      if (!keys.includes(event.key)) return;
      event.preventDefault();
      if (event.key === 'Escape') {
        chart.setActiveElements([]);
        chart.tooltip.setActiveElements([], { x: 0, y: 0 });
        chart.update('none');
        canvas.dataset.cursor = '-1';
        return;
      }
      const targets = [];
      chart.data.datasets.forEach((dataset, datasetIndex) => {
        if (dataset.role === 'set-aside') {
          dataset.data.forEach((point, index) => targets.push({ datasetIndex, index, x: point.x }));
        }
      });
      if (!targets.length) {
        const first = chart.data.datasets.findIndex((dataset) => dataset.keyboard || dataset.role === 'median');
        const datasetIndex = first < 0 ? 0 : first;
        (chart.data.datasets[datasetIndex] || { data: [] }).data.forEach((point, index) => {
          if (point.y !== null) targets.push({ datasetIndex, index, x: point.x });
        });
      }
      if (!targets.length) return;
      targets.sort((a, b) => a.x - b.x);
      let cursor = Number(canvas.dataset.cursor || '-1');
      if (event.key === 'ArrowRight') cursor = Math.min(cursor + 1, targets.length - 1);
      if (event.key === 'ArrowLeft') cursor = Math.max(cursor - 1, 0);
      if (event.key === 'Home') cursor = 0;
      if (event.key === 'End') cursor = targets.length - 1;
      canvas.dataset.cursor = String(cursor);
      const target = { datasetIndex: targets[cursor].datasetIndex, index: targets[cursor].index };
      const element = chart.getDatasetMeta(target.datasetIndex).data[target.index];
      chart.setActiveElements([target]);
      chart.tooltip.setActiveElements([target], { x: element.x, y: element.y });
      chart.update('none');
    });
  }

  // ---------------------------------------------------------------------------------------------
  // Network overview
  // ---------------------------------------------------------------------------------------------

  async function overviewView() {
    const container = $('#overview-areas');
    if (!canRead()) {
      container.replaceChildren();
      needToken();
      return;
    }
    setViewState('Loading…');
    const data = await api('/v1/overview');
    container.replaceChildren();
    for (const area of data.areas) container.append(areaCard(area));
    body.dataset.ready = 'overview';
    if (!data.areas.length) {
      setViewState('No areas yet: an admin creates them with PUT /v1/areas/{area}.');
      return;
    }
    setViewState(data.areas.length + ' areas. Server time ' + timeText(Date.parse(data.now)) + ' UTC.');
  }

  function areaCard(area) {
    const headingId = 'area-' + area.id;
    const card = el('section', { class: 'panel area-card', 'data-area': area.id, 'aria-labelledby': headingId },
      el('h2', { id: headingId },
        el('a', { href: '/areas/' + encodeURIComponent(area.id) }, area.name),
        ' ', el('span', { class: 'mono hint', text: area.id })));
    const facts = [area.stations + ' stations', area.interval + ' intervals'];
    facts.push(area.last_reading_at
      ? 'newest reading ' + agoText(Date.parse(area.last_reading_at)) + ' (' + timeText(Date.parse(area.last_reading_at)) + ' UTC)'
      : 'no readings yet');
    card.append(el('p', { class: 'facts', text: facts.join(' · ') }));
    if (!area.quantities.length) {
      card.append(el('p', { class: 'empty', text: 'No computed results yet.' }));
    } else {
      const rows = area.quantities.map((entry) => {
        const point = entry.latest;
        const start = Date.parse(point.start);
        const end = Date.parse(point.end);
        // The newest reading of this quantity lies in the newest interval, [start, end).
        const since = Math.max(0, serverNow() - end);
        const until = Math.max(0, serverNow() - start);
        return el('tr', { 'data-quantity': entry.quantity },
          el('th', { scope: 'row' }, entry.quantity),
          el('td', { class: 'num', 'data-field': 'median' }, withUnit(point.median, entry.unit)),
          el('td', { 'data-field': 'status' }, el('span', { class: 'status status-' + point.status, text: STATUS_TEXT[point.status] || point.status })),
          el('td', { class: 'num', 'data-field': 'used' }, String(point.stations_used)),
          el('td', { class: 'num', 'data-field': 'set-aside' }, String(point.stations_set_aside)),
          el('td', { 'data-field': 'newest' }, timeText(start) + '–' + clockText(end) + ' (' + agoRangeText(since, until) + ')'));
      });
      card.append(el('div', { class: 'table-scroll' },
        el('table', { class: 'data-table' },
          el('caption', { class: 'visually-hidden', text: 'Newest results in ' + area.name }),
          tableHead(['Quantity', 'Median', 'Status', 'Stations used', 'Stations set aside', 'Newest interval (UTC)']),
          el('tbody', {}, rows))));
    }
    card.append(el('p', { class: 'links' },
      el('a', { href: '/areas/' + encodeURIComponent(area.id) }, 'Charts of ' + area.name),
      ' · ',
      el('a', { href: '/review?' + query({ area: area.id }) }, 'Pending reviews in ' + area.name)));
    return card;
  }

  // ---------------------------------------------------------------------------------------------
  // Area view
  // ---------------------------------------------------------------------------------------------

  async function areaView() {
    const chartsBox = $('#area-charts');
    if (!canRead()) {
      chartsBox.replaceChildren();
      $('#area-stations').hidden = true;
      needToken();
      return;
    }
    setViewState('Loading…');
    const [overview, specs, stationList] = await Promise.all([
      api('/v1/overview'),
      quantityTable(),
      api('/v1/stations'),
    ]);
    const area = overview.areas.find((candidate) => candidate.id === subject);
    if (!area) {
      chartsBox.replaceChildren();
      setViewState('There is no area “' + subject + '”.', 'warn');
      return;
    }
    $('#area-title').replaceChildren(area.name + ' ', el('span', { class: 'mono hint', text: area.id }));
    document.title = area.name + ' · Consensor';
    $('#area-meta').textContent = [
      area.stations + ' stations',
      area.interval + ' intervals',
      area.last_reading_at ? 'newest reading ' + agoText(Date.parse(area.last_reading_at)) : 'no readings yet',
    ].join(' · ');
    const stations = stationList.stations.filter((station) => station.area === area.id);
    $('#area-station-list').replaceChildren(...stations.map((station) =>
      el('li', {}, el('a', { href: '/stations/' + encodeURIComponent(station.id) }, station.id), ' ', el('span', { class: 'hint', text: station.name }))));
    $('#area-stations').hidden = stations.length === 0;
    if (!area.quantities.length) {
      chartsBox.replaceChildren();
      setViewState('No computed results in this area yet.');
      return;
    }
    const hours = Number($('#area-span').value);
    const toMs = Math.max(...area.quantities.map((entry) => Date.parse(entry.latest.end)));
    const fromMs = toMs - hours * HOUR;
    const cards = area.quantities.map((entry) => quantityCard(area, entry));
    chartsBox.replaceChildren(...cards.map((card) => card.section));
    await Promise.all(cards.map((card, index) => fillQuantityCard(card, area, area.quantities[index], specs.get(area.quantities[index].quantity), fromMs, toMs)));
    body.dataset.ready = 'area';
    setViewState('Showing ' + timeText(fromMs) + ' to ' + timeText(toMs) + ' UTC.');
  }

  function quantityCard(area, entry) {
    const headingId = 'chart-heading-' + entry.quantity;
    const canvas = el('canvas', { id: 'chart-' + entry.quantity, role: 'img', tabindex: '0', 'aria-label': 'Chart of ' + entry.quantity + ', loading' });
    const summary = el('p', { class: 'facts' });
    const details = el('details', { class: 'set-aside-details' });
    const section = el('section', { class: 'panel chart-card', 'data-quantity': entry.quantity, 'aria-labelledby': headingId },
      el('h2', { id: headingId }, entry.quantity, ' ', el('span', { class: 'hint', text: '(' + entry.unit + ')' })),
      summary,
      el('div', { class: 'chart-box' }, canvas),
      details,
      el('p', { class: 'links' }, el('a', { href: '/review?' + query({ area: area.id, quantity: entry.quantity }) }, 'Review pending ' + entry.quantity + ' readings of this area')));
    return { section, canvas, summary, details };
  }

  async function fillQuantityCard(card, area, entry, spec, fromMs, toMs) {
    const [series, listing] = await Promise.all([
      api('/v1/areas/' + encodeURIComponent(area.id) + '/series?' + query({ quantity: entry.quantity, from: rfc3339(fromMs), to: rfc3339(toMs) })),
      setAsideAll({ area: area.id, quantity: entry.quantity, from: rfc3339(fromMs), to: rfc3339(toMs) }, MAX_MARKERS),
    ]);
    // An overturned reading is used again: it is no longer set aside, so it gets no marker.
    const markers = listing.items.filter((item) => item.review.state !== 'overturned');
    const latest = entry.latest;
    card.summary.textContent = 'Newest: ' + withUnit(latest.median, entry.unit) + ' at ' + timeText(Date.parse(latest.start)) +
      ' UTC, ' + (STATUS_TEXT[latest.status] || latest.status) + ', ' + latest.stations_used + ' stations used, ' +
      latest.stations_set_aside + ' set aside.';
    consensusChart(card.canvas, {
      series,
      markers,
      spec,
      fromMs,
      toMs,
      highlightId: null,
      title: entry.quantity + ' in ' + area.name,
    });
    card.canvas.dataset.markers = String(markers.length);
    fillSetAsideDetails(card.details, markers, listing.complete);
  }

  function fillSetAsideDetails(details, markers, complete) {
    const shown = markers.slice(0, 200);
    const summaryText = 'Set-aside readings in this span: ' + markers.length + (complete ? '' : ' or more') +
      (markers.length > shown.length ? ' (the first ' + shown.length + ' listed)' : '');
    details.replaceChildren(el('summary', { text: summaryText }));
    if (!shown.length) return;
    details.append(el('div', { class: 'table-scroll' },
      el('table', { class: 'data-table' },
        tableHead(['Observed (UTC)', 'Station', 'Value', 'Rule', 'Reason', 'Review']),
        el('tbody', {}, shown.map((item) => el('tr', { 'data-reading-id': item.reading_id },
          el('td', { text: timeText(Date.parse(item.observed_at)) }),
          el('td', {}, el('a', { href: '/stations/' + encodeURIComponent(item.station) }, item.station)),
          el('td', { text: readingValueText(item) }),
          el('td', {}, ruleCell(item.rule)),
          el('td', { class: 'reason', text: item.reason }),
          el('td', { text: item.review.state })))))));
  }

  // ---------------------------------------------------------------------------------------------
  // Review queue
  // ---------------------------------------------------------------------------------------------

  const queue = { items: [], cursor: null, done: true, selected: null, generation: 0 };

  function filterValues() {
    return {
      area: $('#filter-area').value,
      station: $('#filter-station').value,
      quantity: $('#filter-quantity').value,
      rule: $('#filter-rule').value,
    };
  }

  let reviewSetUp = false;
  let reviewStations = [];

  async function reviewView() {
    const filters = new URLSearchParams(location.search);
    if (!canRead()) {
      $('#queue-body').replaceChildren();
      needToken();
      return;
    }
    setViewState('Loading…');
    const [areas, stationList, specs] = await Promise.all([api('/v1/areas'), api('/v1/stations'), quantityTable()]);
    reviewStations = stationList.stations;
    const current = reviewSetUp ? filterValues() : {
      area: filters.get('area') || '',
      station: filters.get('station') || '',
      quantity: filters.get('quantity') || '',
      rule: filters.get('rule') || '',
    };
    fillSelect($('#filter-area'), 'all areas', areas.areas.map((area) => [area.id, area.name + ' (' + area.id + ')']), current.area);
    fillStationFilter(current.station);
    fillSelect($('#filter-quantity'), 'all quantities', [...specs.keys()].map((id) => [id, id]), current.quantity);
    fillSelect($('#filter-rule'), 'all rules', RULE_ORDER.map((rule) => [rule, RULES[rule].symbol + ' ' + RULES[rule].label]), current.rule);
    if (!reviewSetUp) {
      reviewSetUp = true;
      $('#review-filters').addEventListener('change', (event) => {
        if (event.target.id === 'filter-area') fillStationFilter($('#filter-station').value);
        const values = filterValues();
        history.replaceState(null, '', '/review' + (query(values) ? '?' + query(values) : ''));
        loadQueue(true).catch((error) => setViewState(problemText(error), 'error'));
      });
      $('#review-filters').addEventListener('submit', (event) => event.preventDefault());
      $('#queue-more').addEventListener('click', () => {
        loadQueue(false).catch((error) => setViewState(problemText(error), 'error'));
      });
    }
    await loadQueue(true);
  }

  function fillSelect(select, allText, options, value) {
    select.replaceChildren(el('option', { value: '', text: allText }),
      ...options.map(([id, text]) => el('option', { value: id, text })));
    select.value = options.some(([id]) => id === value) ? value : '';
  }

  function fillStationFilter(value) {
    const area = $('#filter-area').value;
    const stations = reviewStations.filter((station) => !area || station.area === area);
    fillSelect($('#filter-station'), 'all stations', stations.map((station) => [station.id, station.id + ' (' + station.name + ')']), value);
  }

  async function loadQueue(reset) {
    const generation = reset ? ++queue.generation : queue.generation;
    const filters = filterValues();
    if (reset) {
      queue.items = [];
      queue.cursor = null;
      queue.done = false;
      $('#queue-body').replaceChildren();
      setViewState('Loading…');
    }
    let added = 0;
    let pages = 0;
    // The rule is chosen here, not by the API: pages are read until enough rows match.
    while (!queue.done && added < TABLE_ROWS && pages < 20) {
      const page = await api('/v1/set-aside?' + query({
        review: 'pending',
        area: filters.area,
        station: filters.station,
        quantity: filters.quantity,
        limit: 200,
        cursor: queue.cursor,
      }));
      if (generation !== queue.generation) return;
      pages += 1;
      for (const item of page.items) {
        if (filters.rule && item.rule !== filters.rule) continue;
        queue.items.push(item);
        $('#queue-body').append(queueRow(item));
        added += 1;
      }
      queue.cursor = page.next_cursor;
      queue.done = !queue.cursor;
    }
    updateQueueCaption();
    $('#queue-more').hidden = queue.done;
    body.dataset.ready = 'review';
    setViewState(queue.items.length ? 'Showing ' + queue.items.length + ' pending readings' + (queue.done ? '.' : '; more with “Show more”.') : 'Nothing pending matches these filters.');
    if (reset && queue.items.length) {
      await showContext(queue.items[0], null);
    } else if (reset) {
      clearContext();
    }
  }

  function updateQueueCaption() {
    $('#queue-caption').textContent = queue.items.length + ' pending readings listed' + (queue.done ? '' : ' so far') + '.';
  }

  function queueRow(item) {
    const id = item.reading_id;
    const noteId = 'note-' + id;
    const show = el('button', { type: 'button', class: 'show-on-chart', 'aria-pressed': 'false', 'aria-label': 'Show reading ' + id + ' on the chart' }, 'Show on chart');
    const note = el('input', { id: noteId, class: 'note', type: 'text', maxlength: '2000', autocomplete: 'off', placeholder: 'Note (optional)' });
    const uphold = el('button', { type: 'button', class: 'decide uphold', 'data-decision': 'uphold', 'aria-label': 'Uphold: keep reading ' + id + ' set aside' }, 'Uphold');
    const overturn = el('button', { type: 'button', class: 'decide overturn', 'data-decision': 'overturn', 'aria-label': 'Overturn: use reading ' + id + ' again' }, 'Overturn');
    const row = el('tr', { 'data-reading-id': id, 'data-rule': item.rule },
      el('td', { text: timeText(Date.parse(item.observed_at)) }),
      el('td', {}, el('a', { href: '/stations/' + encodeURIComponent(item.station) }, item.station),
        el('span', { class: 'hint block', text: item.area + ' · ' + item.quantity })),
      el('td', { text: readingValueText(item) }),
      el('td', {}, ruleCell(item.rule)),
      el('td', { class: 'reason', text: item.reason }),
      el('td', { class: 'decision' },
        show,
        el('label', { for: noteId, class: 'visually-hidden', text: 'Note on reading ' + id }),
        note,
        el('span', { class: 'decision-buttons' }, uphold, overturn)));
    show.addEventListener('click', () => {
      showContext(item, null).catch((error) => setViewState(problemText(error), 'error'));
    });
    for (const button of [uphold, overturn]) {
      button.addEventListener('click', () => {
        decide(item, row, button.dataset.decision).catch((error) => setDecisionState(problemText(error), 'error'));
      });
    }
    return row;
  }

  function setDecisionState(text, kind) {
    const state = $('#decision-state');
    state.textContent = text;
    state.dataset.kind = kind || 'info';
  }

  async function decide(item, row, decision) {
    if (!token()) {
      setDecisionState('Deciding needs an operator or admin token: enter one above.', 'warn');
      $('#token-input').focus();
      return;
    }
    const buttons = row.querySelectorAll('button, input');
    buttons.forEach((control) => { control.disabled = true; });
    const note = row.querySelector('input.note').value.trim();
    const done = decision === 'overturn' ? 'overturned' : 'upheld';
    setDecisionState('Sending your decision on reading ' + item.reading_id + '…');
    try {
      await api('/v1/set-aside/' + item.reading_id + '/review', {
        method: 'POST',
        body: note ? { decision, note } : { decision },
      });
    } catch (error) {
      buttons.forEach((control) => { control.disabled = false; });
      setDecisionState(problemText(error), 'error');
      return;
    }
    // Keyboard users continue from the next row.
    const next = row.nextElementSibling;
    row.remove();
    queue.items = queue.items.filter((candidate) => candidate.reading_id !== item.reading_id);
    updateQueueCaption();
    setViewState('Showing ' + queue.items.length + ' pending readings' + (queue.done ? '.' : '; more with “Show more”.'));
    if (next) next.querySelector('button.show-on-chart').focus();
    setDecisionState('Reading ' + item.reading_id + ' ' + done + '. Waiting for its interval to be computed again…');
    await showContext(item, null);
    const point = await waitForRevision(item);
    if (!point) {
      setDecisionState('Reading ' + item.reading_id + ' ' + done + '. Its interval has not been computed again yet; the chart will show the change once it has.', 'warn');
      return;
    }
    await showContext(item, decision);
    const unit = item.unit || '';
    setDecisionState('Reading ' + item.reading_id + ' ' + done + '. The interval ' + timeText(Date.parse(point.start)) + '–' +
      clockText(Date.parse(point.end)) + ' UTC is now revision ' + point.revision + ': median ' + withUnit(point.median, unit) +
      ' from ' + point.stations_used + ' stations.', 'done');
    body.dataset.lastDecision = item.reading_id + ':' + decision + ':' + point.revision;
  }

  /** Polls the reading's interval until a revision newer than the one that set it aside exists. */
  async function waitForRevision(item) {
    const path = '/v1/areas/' + encodeURIComponent(item.area) + '/intervals/' + encodeURIComponent(item.interval_start) +
      '?' + query({ quantity: item.quantity });
    const deadline = Date.now() + 60000;
    while (Date.now() < deadline) {
      const point = await api(path);
      if (point.revision > item.revision) return point;
      await sleep(300);
    }
    return null;
  }

  function clearContext() {
    const canvas = $('#context-chart');
    const chart = Chart.getChart(canvas);
    if (chart) chart.destroy();
    canvas.setAttribute('aria-label', 'No reading selected');
    $('#context-caption').textContent = 'Nothing to show.';
    queue.selected = null;
  }

  /** The reading's area and quantity over six hours around it, the reading drawn larger. */
  async function showContext(item, decision) {
    queue.selected = item.reading_id;
    for (const button of document.querySelectorAll('#queue-body button.show-on-chart')) {
      button.setAttribute('aria-pressed', String(button.closest('tr').dataset.readingId === String(item.reading_id)));
    }
    const specs = await quantityTable();
    const observed = Date.parse(item.observed_at);
    const fromMs = Math.floor((observed - 3 * HOUR) / HOUR) * HOUR;
    const toMs = fromMs + 7 * HOUR;
    const [series, listing] = await Promise.all([
      api('/v1/areas/' + encodeURIComponent(item.area) + '/series?' + query({ quantity: item.quantity, from: rfc3339(fromMs), to: rfc3339(toMs) })),
      setAsideAll({ area: item.area, quantity: item.quantity, from: rfc3339(fromMs), to: rfc3339(toMs) }, MAX_MARKERS),
    ]);
    if (queue.selected !== item.reading_id) return;
    const markers = listing.items.filter((candidate) => candidate.review.state !== 'overturned');
    const canvas = $('#context-chart');
    consensusChart(canvas, {
      series,
      markers,
      spec: specs.get(item.quantity),
      fromMs,
      toMs,
      highlightId: item.reading_id,
      title: item.quantity + ' in ' + item.area,
    });
    canvas.dataset.markers = String(markers.length);
    canvas.dataset.reading = String(item.reading_id);
    let caption = item.quantity + ' in ' + item.area + ', ' + timeText(fromMs) + ' to ' + clockText(toMs) + ' UTC. ';
    if (decision === 'overturn') caption += 'Reading ' + item.reading_id + ' is overturned: it is used again, so it has no marker.';
    else if (decision === 'uphold') caption += 'Reading ' + item.reading_id + ' stays set aside (upheld): the larger marker.';
    else caption += 'Reading ' + item.reading_id + ' (' + item.station + ') is the larger marker.';
    $('#context-caption').textContent = caption;
  }

  // ---------------------------------------------------------------------------------------------
  // Station view
  // ---------------------------------------------------------------------------------------------

  let stationSetUp = false;
  const stationHistory = { items: [], shown: 0 };

  async function stationView() {
    const params = new URLSearchParams(location.search);
    if (!canRead()) {
      $('#station-body').hidden = true;
      needToken();
      return;
    }
    if (!stationSetUp) {
      stationSetUp = true;
      if (['1', '3', '7', '30'].includes(params.get('days'))) $('#station-days').value = params.get('days');
      $('#station-controls').addEventListener('change', () => {
        stationView().catch((error) => setViewState(problemText(error), 'error'));
      });
      $('#station-controls').addEventListener('submit', (event) => event.preventDefault());
      $('#history-more').addEventListener('click', showMoreHistory);
    }
    setViewState('Loading…');
    const [stationList, specs] = await Promise.all([api('/v1/stations'), quantityTable()]);
    const station = stationList.stations.find((candidate) => candidate.id === subject);
    if (!station) {
      $('#station-body').hidden = true;
      setViewState('There is no station “' + subject + '”.', 'warn');
      return;
    }
    $('#station-title').replaceChildren(station.name + ' ', el('span', { class: 'mono hint', text: station.id }));
    document.title = 'Station ' + station.id + ' · Consensor';
    $('#station-meta').replaceChildren('In area ', el('a', { href: '/areas/' + encodeURIComponent(station.area) }, station.area), '.');
    const days = Number($('#station-days').value);
    const reports = await Promise.all([...specs.keys()].map((quantity) =>
      api('/v1/stations/' + encodeURIComponent(station.id) + '/health?' + query({ quantity, days }))));
    const measured = reports.filter((report) => report.readings > 0 || report.intervals > 0);
    const select = $('#station-quantity');
    const wanted = select.value || params.get('quantity') || '';
    select.replaceChildren(...measured.map((report) => el('option', { value: report.quantity, text: report.quantity + ' (' + report.unit + ')' })));
    if (!measured.length) {
      $('#station-body').hidden = true;
      setViewState('No readings from this station in the last ' + days + ' days.');
      return;
    }
    select.value = measured.some((report) => report.quantity === wanted) ? wanted : measured[0].quantity;
    const health = measured.find((report) => report.quantity === select.value);
    history.replaceState(null, '', '/stations/' + encodeURIComponent(station.id) + '?' + query({ quantity: health.quantity, days }));
    await drawStation(station, health, specs.get(health.quantity));
    $('#station-body').hidden = false;
    body.dataset.ready = 'station';
    setViewState('Showing ' + health.quantity + ' from ' + timeText(Date.parse(health.from)) + ' to ' + timeText(Date.parse(health.to)) + ' UTC.');
  }

  async function drawStation(station, health, spec) {
    const unit = health.unit;
    const fromMs = Date.parse(health.from);
    const toMs = Date.parse(health.to);
    const [values, listing] = await Promise.all([
      api('/v1/stations/' + encodeURIComponent(station.id) + '/values?' + query({ quantity: health.quantity, from: health.from, to: health.to })),
      setAsideAll({ station: station.id, quantity: health.quantity, from: health.from, to: health.to }, MAX_MARKERS),
    ]);
    const length = intervalMs(values.interval);
    const points = values.points.map((point) => ({
      x: Date.parse(point.start) + length / 2,
      station: point.station_value,
      area: point.area_median,
      used: point.used,
    }));
    fillHealthSummary(health, unit);
    const [axisFrom, axisTo] = dataSpan(fromMs, toMs, length,
      values.points.flatMap((point) => [Date.parse(point.start), Date.parse(point.start) + length])
        .concat(listing.items.map((item) => Date.parse(item.observed_at))));

    // 1. The station's values beside the area median, with its set-aside readings.
    const markers = listing.items.filter((item) => item.review.state !== 'overturned');
    const valueLimits = bounds(points.flatMap((point) => [point.station, point.area])
      .concat(markers.map((item) => item.value).filter((value) => plausible(spec, value))), spec ? spec.range_min : undefined, rangeCeiling(spec));
    draw($('#values-chart'), {
      type: 'line',
      data: {
        datasets: [
          { label: 'Area median', role: 'area-median', keyboard: true, data: points.map((point) => ({ x: point.x, y: point.area })), borderColor: PALETTE.blue, backgroundColor: PALETTE.blue, borderWidth: 2, pointRadius: points.length <= 48 ? 3 : 0, legendStyle: 'line' },
          { label: 'Station value', role: 'station-value', data: points.map((point) => ({ x: point.x, y: point.station, used: point.used })), borderColor: PALETTE.green, backgroundColor: PALETTE.green, borderWidth: 2, borderDash: [3, 3], pointRadius: points.length <= 48 ? 3 : 0, legendStyle: 'line' },
          ...markerDatasets(markers, valueLimits, null),
        ],
      },
      options: baseOptions(axisFrom, axisTo, unit, valueLimits, (context) => {
        const raw = context.raw;
        if (raw.item) return markerLines(raw.item);
        return context.dataset.label + ': ' + withUnit(raw.y, unit) + (raw.used === false ? ' (set aside: far from the area)' : '');
      }),
    });
    $('#values-chart').setAttribute('aria-label', 'Chart of ' + station.id + ' ' + health.quantity + ' values against the area median: ' + points.length + ' intervals, ' + markers.length + ' set-aside readings. Use the arrow keys to step through them.');

    // 2. The residual with the drift line and its 95 % interval. The line goes through the median
    //    time and the median residual with the Theil–Sen slope (the intercept scipy's theilslopes
    //    reports: median(y) − slope · median(x)); the interval lines use the ends of the slope's
    //    interval through the same point.
    const residuals = points.map((point) => ({ x: point.x, y: point.station - point.area, used: point.used }));
    const residualDatasets = [
      { label: 'Residual (station − area median)', role: 'residual', keyboard: true, showLine: false, data: residuals, borderColor: PALETTE.green, backgroundColor: alpha(PALETTE.green, 0.5), pointRadius: 3, pointStyle: 'circle', legendStyle: 'circle' },
    ];
    const fitValues = residuals.map((point) => point.y);
    if (residuals.length && health.drift_per_day !== null) {
      const pivotX = median(residuals.map((point) => point.x));
      const pivotY = median(fitValues);
      const ends = [residuals[0].x, pivotX, residuals[residuals.length - 1].x];
      const line = (slopePerDay) => ends.map((x) => ({ x, y: pivotY + slopePerDay * (x - pivotX) / DAY }));
      const [low, high] = health.drift_per_day_ci95;
      if (low !== null && high !== null) {
        const upper = line(high);
        const lower = line(low);
        fitValues.push(...upper.map((point) => point.y), ...lower.map((point) => point.y));
        residualDatasets.push(
          { label: 'Drift 95 % interval', role: 'drift-band', data: upper, fill: '+1', backgroundColor: alpha(PALETTE.orange, 0.25), borderColor: alpha(PALETTE.orange, 0.8), borderWidth: 1, pointRadius: 0, legendStyle: 'rect' },
          { label: 'drift low', role: 'drift-band-low', helper: true, data: lower, fill: false, borderColor: alpha(PALETTE.orange, 0.8), borderWidth: 1, pointRadius: 0 });
      }
      const drift = line(health.drift_per_day);
      fitValues.push(...drift.map((point) => point.y));
      residualDatasets.push({ label: 'Drift (Theil–Sen): ' + signed(health.drift_per_day) + ' ' + unit + '/day', role: 'drift', data: drift, borderColor: PALETTE.vermillion, backgroundColor: PALETTE.vermillion, borderWidth: 2.5, pointRadius: 0, legendStyle: 'line' });
    }
    const residualLimits = bounds(fitValues.concat([0]));
    draw($('#residual-chart'), {
      type: 'line',
      data: { datasets: residualDatasets },
      options: baseOptions(axisFrom, axisTo, unit, residualLimits, (context) => {
        const raw = context.raw;
        if (context.dataset.role === 'residual') return 'Residual: ' + signed(raw.y) + ' ' + unit + (raw.used === false ? ' (station value set aside)' : '');
        return context.dataset.label.split(':')[0] + ': ' + signed(raw.y) + ' ' + unit;
      }),
    });
    $('#residual-chart').setAttribute('aria-label', 'Residual of ' + station.id + ' against the area median, ' + residuals.length + ' intervals; drift ' +
      (health.drift_per_day === null ? 'not estimated (too few intervals)' : signed(health.drift_per_day) + ' ' + unit + ' per day') + '.');

    // 3. Calibration: area median against station value, the LAD line and the line of no change.
    const pairs = points.map((point) => ({ x: point.station, y: point.area }));
    const xs = pairs.map((pair) => pair.x);
    const calibrationDatasets = [
      { label: 'Interval (station value, area median)', role: 'pairs', keyboard: true, showLine: false, data: pairs, borderColor: PALETTE.blue, backgroundColor: alpha(PALETTE.blue, 0.45), pointRadius: 3, pointStyle: 'circle', legendStyle: 'circle' },
    ];
    const calibrationValues = pairs.flatMap((pair) => [pair.x, pair.y]);
    if (xs.length) {
      const lo = Math.min(...xs);
      const hi = Math.max(...xs);
      calibrationDatasets.push({ label: 'No correction (area = station)', role: 'identity', data: [{ x: lo, y: lo }, { x: hi, y: hi }], borderColor: PALETTE.grey, borderDash: [5, 5], borderWidth: 1.5, pointRadius: 0, legendStyle: 'line' });
      const { gain, offset } = health.calibration;
      if (gain !== null && offset !== null) {
        const fit = [{ x: lo, y: gain * lo + offset }, { x: hi, y: gain * hi + offset }];
        calibrationValues.push(...fit.map((point) => point.y));
        calibrationDatasets.push({ label: 'Suggested calibration: area = ' + number(gain) + ' × station ' + (offset < 0 ? '− ' + number(-offset) : '+ ' + number(offset)), role: 'calibration', data: fit, borderColor: PALETTE.vermillion, borderWidth: 2.5, pointRadius: 0, legendStyle: 'line' });
      }
    }
    const xLimits = bounds(xs);
    const yLimits = bounds(calibrationValues);
    draw($('#calibration-chart'), {
      type: 'line',
      data: { datasets: calibrationDatasets },
      options: {
        parsing: false,
        animation: false,
        maintainAspectRatio: false,
        interaction: { mode: 'nearest', intersect: false },
        scales: {
          x: { type: 'linear', min: xLimits.min, max: xLimits.max, ticks: { stepSize: xLimits.step }, title: { display: true, text: 'station value (' + unit + ')' } },
          y: { min: yLimits.min, max: yLimits.max, ticks: { stepSize: yLimits.step }, title: { display: true, text: 'area median (' + unit + ')' } },
        },
        plugins: chartPlugins({
          label: (context) => context.dataset.label.split(':')[0] + ': station ' + number(context.raw.x) + ', area ' + number(context.raw.y) + ' ' + unit,
        }),
      },
    });
    $('#calibration-chart').setAttribute('aria-label', 'Calibration of ' + station.id + ': ' + pairs.length + ' intervals; ' +
      (health.calibration.gain === null ? 'no calibration line (too few intervals, or the station value never varied).' : 'area = ' + number(health.calibration.gain) + ' × station + ' + number(health.calibration.offset) + '.'));

    // 4. The set-aside history, newest first, every review state.
    stationHistory.items = listing.items.slice().reverse();
    stationHistory.shown = 0;
    $('#history-body').replaceChildren();
    $('#history-caption').textContent = listing.items.length + (listing.complete ? '' : ' or more') + ' set-aside readings of ' + health.quantity + ' in the window.';
    showMoreHistory();
  }

  function showMoreHistory() {
    const next = stationHistory.items.slice(stationHistory.shown, stationHistory.shown + TABLE_ROWS);
    stationHistory.shown += next.length;
    $('#history-body').append(...next.map((item) => el('tr', { 'data-reading-id': item.reading_id },
      el('td', { text: timeText(Date.parse(item.observed_at)) }),
      el('td', { text: readingValueText(item) }),
      el('td', {}, ruleCell(item.rule)),
      el('td', { class: 'reason', text: item.reason }),
      el('td', { text: item.review.state + (item.review.note ? ': ' + item.review.note : '') }))));
    $('#history-more').hidden = stationHistory.shown >= stationHistory.items.length;
  }

  /** The options every time chart shares: time x axis, value y axis in `unit`, the legend, and a
   * tooltip with `label` and `title` (by default the point's time). */
  function baseOptions(fromMs, toMs, unit, limits, label, title = (items) => (items.length ? timeText(items[0].raw.x) + ' UTC' : '')) {
    return {
      parsing: false,
      normalized: true,
      animation: false,
      maintainAspectRatio: false,
      spanGaps: false,
      interaction: { mode: 'nearest', axis: 'x', intersect: false },
      scales: {
        x: timeAxis(fromMs, toMs),
        y: { min: limits.min, max: limits.max, ticks: { stepSize: limits.step }, title: { display: true, text: unit } },
      },
      plugins: chartPlugins({ title, label }),
    };
  }

  /** The legend and the tooltip (with `callbacks`, skipping helper series) of every chart. */
  function chartPlugins(callbacks) {
    return {
      legend: legendOptions(),
      tooltip: {
        usePointStyle: true,
        filter: (item) => !item.dataset.helper,
        callbacks,
      },
    };
  }

  function fillHealthSummary(health, unit) {
    const facts = [
      ['Readings in the window', String(health.readings)],
      ['Set aside', health.set_aside + (health.set_aside_rate === null ? '' : ' (' + number(health.set_aside_rate * 100) + ' %)')],
      ['Intervals compared with the area', String(health.intervals)],
      ['Bias (median of station − area median)', health.bias === null ? '—' : signed(health.bias) + ' ' + unit],
      ['Drift per day (Theil–Sen)', health.drift_per_day === null ? 'too few intervals'
        : signed(health.drift_per_day) + ' ' + unit + '/day (95 % interval ' + signed(health.drift_per_day_ci95[0]) + ' to ' + signed(health.drift_per_day_ci95[1]) + ')'],
      ['Suggested calibration', health.calibration.gain === null ? 'none: too few intervals, or the station value never varied'
        : 'area = ' + number(health.calibration.gain) + ' × station ' + (health.calibration.offset < 0 ? '− ' + number(-health.calibration.offset) : '+ ' + number(health.calibration.offset))],
      ['Last reading (any quantity)', health.last_seen ? timeText(Date.parse(health.last_seen)) + ' UTC, ' + agoText(Date.parse(health.last_seen)) : 'never'],
    ];
    $('#health-summary').replaceChildren(...facts.flatMap(([term, value]) => [el('dt', { text: term }), el('dd', { text: value })]));
  }

  // ---------------------------------------------------------------------------------------------
  // Start
  // ---------------------------------------------------------------------------------------------

  const VIEWS = { overview: overviewView, area: areaView, review: reviewView, station: stationView };

  function start() {
    const run = VIEWS[view];
    const load = () => {
      if (!run) return;
      run().catch((error) => setViewState(problemText(error), 'error'));
    };
    setupToken(load);
    if (view === 'area') {
      const span = new URLSearchParams(location.search).get('span');
      if ([...$('#area-span').options].some((option) => option.value === span)) $('#area-span').value = span;
      $('#area-span').addEventListener('change', () => {
        history.replaceState(null, '', location.pathname + '?' + query({ span: $('#area-span').value }));
        load();
      });
      $('#area-controls').addEventListener('submit', (event) => event.preventDefault());
    }
    if (typeof Chart === 'undefined') {
      setViewState('The chart library did not load; reload the page.', 'error');
      return;
    }
    Chart.defaults.font.size = 13;
    Chart.defaults.color = '#1a1a1a';
    load();
  }

  start();
})();
