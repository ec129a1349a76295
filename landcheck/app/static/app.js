/* landcheck desk: the browser side of `landcheck app`. Plain JavaScript, no libraries, no network but this app. */
"use strict";
(function () {
  const TOKEN = document.querySelector('meta[name="landcheck-token"]').content;
  const view = document.getElementById("view");
  const crumbs = document.getElementById("crumbs");
  const VERDICTS = ["consistent", "conflict", "review", "no_data", "no_rule"];
  const KINDS = ["easement", "flood_polygons", "hand", "sea_rise"];
  let timer = null;
  let routeGen = 0; // a page drawn for an older address never overwrites the current one

  // ------------------------------------------------------------------ small helpers
  function h(tag, attrs, ...kids) {
    const el = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (v === null || v === undefined || v === false) continue;
      if (k.startsWith("on")) el.addEventListener(k.slice(2), v);
      else if (k === "text") el.textContent = v;
      else el.setAttribute(k, v === true ? "" : v);
    }
    for (const kid of kids.flat()) if (kid !== null && kid !== undefined) el.append(kid.nodeType ? kid : String(kid));
    return el;
  }
  async function api(method, url, body) {
    const opts = { method, headers: {} };
    if (method !== "GET") opts.headers["X-Landcheck-Token"] = TOKEN;
    if (body instanceof FormData) opts.body = body;
    else if (body !== undefined) { opts.body = JSON.stringify(body); opts.headers["Content-Type"] = "application/json"; }
    const r = await fetch(url, opts);
    let data = {};
    try { data = await r.json(); } catch (e) { data = { error: "the app answered " + r.status }; }
    if (!r.ok) throw new Error(data.error || ("the app answered " + r.status));
    return data;
  }
  function msg(kind, text, id) { return h("div", { class: "msg " + kind, id: id, role: kind === "bad" ? "alert" : null, text }); }
  function fmtNum(v, d) { return (v === null || v === undefined || v === "") ? "–" : Number(v).toLocaleString("en", { maximumFractionDigits: d === undefined ? 2 : d }); }
  // plain words for readers: verdicts and column names of parcels.csv (docs/outputs.md)
  const VERDICT_WORDS = { no_data: "no data", no_rule: "no rule" };
  const say = v => VERDICT_WORDS[v] || String(v).replace(/_/g, " ");
  const FIELD_WORDS = {
    parcel_id: "Parcel id", class_value: "Class value", class_name: "Class", area_m2: "Area (m²)",
    covered_m2: "Covered by the DEM (m²)", evaluated_m2: "With a slope value (m²)", evaluated_share: "Share with a slope value",
    slope_mean_pct: "Mean slope (%)", slope_max_pct: "Steepest slope (%)", max_slope_pct: "Slope limit of the class (%)",
    over_limit_m2: "At or over the limit (m²)", over_limit_share: "Share at or over the limit", near_limit_m2: "Near the limit (m²)",
    conflict_m2: "Conflict area (m²)", conflict_share: "Conflict share", verdict: "Verdict", reasons: "Reasons",
    geometry_note: "Geometry note", p_conflict: "Chance of conflict under DEM error", confidence: "Confidence",
    share_over_limit: "Share at or over the limit",
  };
  const field = k => FIELD_WORDS[k] || k.replace(/^zone_/, "zone ").replace(/_m2$/, " (m²)").replace(/_share$/, " share").replace(/_/g, " ");
  function fieldValue(k, v) {
    if (v === "" || v === null || v === undefined) return "–";
    if (k === "verdict" || k === "confidence") return say(v);
    if (/share$|^p_conflict$/.test(k)) return fmtNum(100 * Number(v), 1) + " %";
    if (/_m2$/.test(k)) return fmtNum(v, 1);
    if (/_pct$/.test(k)) return fmtNum(v, 1);
    return String(v);
  }
  function badge(v) { return h("span", { class: "badge v-" + v, text: say(v) }); }
  function setCrumbs(...parts) { crumbs.replaceChildren(...parts.flatMap((p, i) => i ? [" › ", p] : [p])); }
  function stopTimer() { if (timer) { clearTimeout(timer); timer = null; } }

  // ------------------------------------------------------------------ router
  async function route() {
    stopTimer();
    routeGen++;
    const m = location.hash.match(/^#\/(p|r)\/(\d+)(?:\/parcel\/(.+))?$/);
    try {
      if (!m) await projectsPage();
      else if (m[1] === "p") await projectPage(+m[2]);
      else await runPage(+m[2], m[3] ? decodeURIComponent(m[3]) : null);
    } catch (e) { view.replaceChildren(msg("bad", e.message)); }
  }
  window.addEventListener("hashchange", route);

  // ------------------------------------------------------------------ projects
  async function projectsPage() {
    const my = routeGen;
    setCrumbs(h("span", { text: "Projects" }));
    const data = await api("GET", "/api/projects");
    if (my !== routeGen) return;
    const name = h("input", { type: "text", id: "new-project-name", placeholder: "e.g. Alderwane hillsides", size: 34 });
    const out = h("div");
    const create = async () => {
      try { const p = await api("POST", "/api/projects", { name: name.value }); location.hash = "#/p/" + p.id; }
      catch (e) { out.replaceChildren(msg("bad", e.message)); }
    };
    view.replaceChildren(
      h("h1", { text: "Projects" }),
      h("div", { class: "steps" },
        h("section", { class: "panel" }, h("h2", { text: "Start a project" }),
          h("p", { class: "muted", text: "A project holds one DEM, one parcel layer, hazard layers, rulebook versions and runs." }),
          h("div", { class: "row" }, name, h("button", { id: "new-project-btn", onclick: create, text: "Create" })), out),
        h("section", { class: "panel" }, h("h2", { text: "Come back to one" }),
          data.projects.length ? h("ul", { class: "plain", id: "project-list" }, data.projects.map(p =>
            h("li", {}, h("a", { href: "#/p/" + p.id, text: p.name }), h("span", { class: "muted", text: ` · ${p.runs} run(s) · since ${p.created_utc}` }))))
            : h("p", { class: "muted", text: "No projects yet." }))));
  }

  // ------------------------------------------------------------------ one project
  let P = null; // project data
  let RB = null; // rulebook form state (shaped like the TOML file)
  let lastToml = "";

  async function projectPage(pid) {
    const my = routeGen;
    const got = await api("GET", "/api/projects/" + pid);
    if (my !== routeGen) return;
    P = got;
    setCrumbs(h("a", { href: "#/", text: "Projects" }), h("span", { text: P.project.name }));
    if (!RB || RB._pid !== pid) {
      RB = { _pid: pid, rulebook: { title: P.project.name }, slope: { method: "horn" }, classes: {}, zones: {} };
      if (P.latest_rulebook) {
        try { const l = await api("POST", `/api/projects/${pid}/rulebook/load`, { text: P.latest_rulebook }); if (l.state) RB = Object.assign({ _pid: pid }, l.state); } catch (e) { /* keep empty */ }
      }
    }
    if (my !== routeGen) return;
    const inputsPanel = h("section", { class: "panel", id: "inputs-panel" }, h("h2", {}, h("span", { class: "n", text: "1" }), "Inputs"));
    const rbPanel = h("section", { class: "panel", id: "rulebook-panel" }, h("h2", {}, h("span", { class: "n", text: "2" }), "Rulebook"));
    const tomlPanel = h("section", { class: "panel", id: "toml-panel" }, h("h2", { text: "Rulebook file (TOML)" }));
    const runPanel = h("section", { class: "panel", id: "run-panel" }, h("h2", {}, h("span", { class: "n", text: "3" }), "Run"));
    const runsPanel = h("section", { class: "panel wide", id: "runs-panel" }, h("h2", {}, h("span", { class: "n", text: "4" }), "Runs"));
    view.replaceChildren(h("h1", { text: P.project.name }), h("div", { class: "steps" }, inputsPanel, rbPanel, tomlPanel, runPanel, runsPanel));
    drawInputs(inputsPanel);
    drawRulebook(rbPanel);
    drawToml(tomlPanel);
    drawRun(runPanel);
    drawRuns(runsPanel);
    renderToml();
  }

  function inputOf(role) { return P.inputs.filter(i => i.role === role); }

  function factsOf(info) {
    const rows = [["CRS", `${info.crs}${info.epsg ? " (EPSG:" + info.epsg + ")" : ""}`], ["Units", info.linear_unit + (info.z_unit ? `; elevations in ${info.z_unit} (as chosen)` : "")]];
    if (info.kind === "raster") {
      rows.push(["Cell size", `${fmtNum(info.cell_size[0], 6)} × ${fmtNum(info.cell_size[1], 6)}`], ["Size", `${info.width} × ${info.height} cells, band ${info.band} of ${info.bands}, ${info.dtype}`], ["No-data", info.nodata === null ? "none" : info.nodata]);
    } else {
      rows.push(["Features", `${info.features} (${info.geometry_types.join(", ")})`], ["Fields", info.fields.map(f => f.name).join(", ") || "none"]);
    }
    rows.push(["Extent", info.bounds.map(b => fmtNum(b, 3)).join(", ")]);
    return h("dl", { class: "facts" }, rows.flatMap(([k, v]) => [h("dt", { text: k }), h("dd", { text: String(v) })]));
  }

  function uploader(role, title, accept, extra) {
    const file = h("input", { type: "file", id: "file-" + role, accept });
    const out = h("div", { id: "msg-" + role });
    const go = h("button", { id: "upload-" + role, text: "Upload and check" });
    go.addEventListener("click", async () => {
      if (!file.files.length) { out.replaceChildren(msg("bad", "choose a file first.")); return; }
      const fd = new FormData();
      for (const el of extra) if (el.value) fd.append(el.name, el.value);
      fd.append("file", file.files[0]);
      go.disabled = true; out.replaceChildren(msg("note", "uploading and checking " + file.files[0].name + " …"));
      try { await api("POST", `/api/projects/${P.project.id}/inputs/${role}`, fd); await projectPage(P.project.id); }
      catch (e) { out.replaceChildren(msg("bad", e.message)); go.disabled = false; }
    });
    return h("div", { class: "drop" }, h("h3", { text: title }), h("div", { class: "row" }, file, ...extra.map(el => h("label", {}, el.title + " ", el)), go), out);
  }

  function drawInputs(panel) {
    const zunit = h("select", { name: "z_unit", id: "dem-zunit", title: "elevation unit" }, ["m", "ft", "us-ft"].map(u => h("option", { value: u, text: u })));
    const band = h("input", { type: "number", name: "band", min: 1, title: "band", placeholder: "auto" });
    const players = h("input", { type: "text", name: "layer", title: "layer", size: 10, placeholder: "if several" });
    const hlayer = h("input", { type: "text", name: "layer", title: "layer", size: 10, placeholder: "if several" });
    for (const [role, title] of [["dem", "DEM"], ["parcels", "Parcel layer"]]) {
      const cur = inputOf(role)[0];
      panel.append(uploader(role, title + (cur ? " (replace)" : ""), role === "dem" ? ".tif,.tiff,.vrt,.img,.asc,.nc,.hgt,.jp2" : ".gpkg,.geojson,.json,.zip,.parquet,.geoparquet,.fgb", role === "dem" ? [zunit, band] : [players]));
      if (cur) panel.append(h("div", { class: "input-card", id: "card-" + role }, h("strong", { text: cur.name }), h("span", { class: "muted", text: " sha256 " + cur.sha256.slice(0, 12) + "…" }), factsOf(cur.info)));
    }
    panel.append(uploader("hazard", "Hazard layers (optional: shoreline, rivers, flood polygons …)", ".gpkg,.geojson,.json,.zip,.parquet,.geoparquet,.fgb", [hlayer]));
    for (const hz of inputOf("hazard")) panel.append(h("div", { class: "input-card" }, h("strong", { text: hz.name }), h("span", { class: "muted", text: ` · layer key "${hz.info.key}"` }), factsOf(hz.info)));
  }

  // ------------------------------------------------------------------ rulebook form
  function parcelFields() { const p = inputOf("parcels")[0]; return p ? p.info.fields : []; }
  function num(obj, key, label, attrs) {
    const el = h("input", Object.assign({ type: "number", step: "any", name: key, value: obj[key] ?? "" }, attrs || {}));
    el.addEventListener("input", () => { if (el.value === "") delete obj[key]; else obj[key] = Number(el.value); renderToml(); });
    return h("label", {}, label + " ", el);
  }
  function txt(obj, key, label, attrs) {
    const el = h("input", Object.assign({ type: "text", name: key, value: obj[key] ?? "" }, attrs || {}));
    el.addEventListener("input", () => { if (el.value === "") delete obj[key]; else obj[key] = el.value; renderToml(); });
    return h("label", {}, label + " ", el);
  }
  function sel(obj, key, label, options, attrs, blank) {
    const el = h("select", Object.assign({ name: key }, attrs || {}), blank !== false ? h("option", { value: "", text: blank || "—" }) : null, options.map(o => h("option", { value: o, text: o, selected: obj[key] === o })));
    el.addEventListener("change", () => { if (el.value === "") delete obj[key]; else obj[key] = el.value; renderToml(); drawRulebookAgain(); });
    return h("label", {}, label + " ", el);
  }
  let rbPanelRef = null;
  function drawRulebookAgain() { if (rbPanelRef) { const keep = rbPanelRef.querySelector("h2"); rbPanelRef.replaceChildren(keep); drawRulebook(rbPanelRef); } }

  function drawRulebook(panel) {
    rbPanelRef = panel;
    RB.rulebook = RB.rulebook || {}; RB.classes = RB.classes || {}; RB.zones = RB.zones || {}; RB.slope = RB.slope || {};
    const fields = parcelFields();
    const names = fields.map(f => f.name);
    if (!fields.length) panel.append(msg("note", "Upload the parcel layer first: its fields fill the choices below."));
    panel.append(h("div", {},
      txt(RB.rulebook, "title", "Title", { id: "rb-title", size: 24 }),
      sel(RB.rulebook, "class_field", "Class field", names, { id: "class-field" }),
      sel(RB.rulebook, "id_field", "Id field", names.filter(n => (fields.find(f => f.name === n) || {}).unique), { id: "id-field" }, "row number"),
      sel(RB.slope, "method", "Slope method", ["horn", "zevenbergen-thorne"], { id: "slope-method" }, false),
      num(RB.rulebook, "min_evaluated_share", "Min. evaluated share (0–1)", { min: 0, max: 1 })));
    const cf = fields.find(f => f.name === RB.rulebook.class_field);
    const found = cf ? cf.values : [];
    const taken = {};
    for (const [cn, c] of Object.entries(RB.classes)) for (const v of (c.values || [])) taken[v] = cn;
    if (cf) panel.append(h("p", { id: "class-values" }, h("span", { class: "muted", text: `Class values found in "${cf.name}": ` }),
      h("span", { class: "chips" }, found.map(v => h("span", { class: "chip", text: v + (taken[v] ? " → " + taken[v] : "") })))));

    const zoneNames = Object.keys(RB.zones);
    const classNames = Object.keys(RB.classes);
    for (const [cn, c] of Object.entries(RB.classes)) {
      const vals = h("div", { class: "chips" }, [...new Set([...found, ...(c.values || [])])].map(v => {
        const box = h("input", { type: "checkbox", name: "value", value: v, checked: (c.values || []).includes(v), disabled: taken[v] && taken[v] !== cn });
        box.addEventListener("change", () => { c.values = (c.values || []).filter(x => x !== v); if (box.checked) c.values.push(v); renderToml(); drawRulebookAgain(); });
        return h("label", { class: "chip" }, box, " " + v);
      }));
      const dev = h("input", { type: "checkbox", name: "development", checked: c.development !== false });
      dev.addEventListener("change", () => { c.development = dev.checked; renderToml(); });
      const forb = h("div", { class: "chips" }, zoneNames.length ? zoneNames.map(z => {
        const box = h("input", { type: "checkbox", name: "forbidden", value: z, checked: (c.forbidden_zones || []).includes(z) });
        box.addEventListener("change", () => { c.forbidden_zones = (c.forbidden_zones || []).filter(x => x !== z); if (box.checked) c.forbidden_zones.push(z); renderToml(); });
        return h("label", { class: "chip" }, box, " " + z);
      }) : h("span", { class: "muted", text: "no zones yet" }));
      const del = h("button", { class: "quiet", text: "Remove", onclick: () => { delete RB.classes[cn]; renderToml(); drawRulebookAgain(); } });
      panel.append(h("div", { class: "block", "data-class": cn },
        h("div", { class: "head" }, h("h3", { text: "Class " + cn }), del),
        txt(c, "label", "Label", { size: 18 }), h("label", {}, dev, " development class"),
        sel(c, "context", "Context", ["urban", "agricultural", "forest"]),
        h("div", {}, h("span", { class: "muted", text: "Values: " }), vals),
        h("div", {}, num(c, "max_slope_pct", "Slope limit %", { min: 0, max: 100 }), num(c, "tolerance_pct", "Tolerance %", { min: 0, max: 100 }),
          num(c, "min_breach_m2", "Min. breach m²", { min: 0 }), num(c, "review_band_pct", "Review band (points)", { min: 0 })),
        h("div", {}, h("span", { class: "muted", text: "Forbidden zones: " }), forb),
        sel(c, "designated_class", "Designated class", classNames.filter(n => n !== cn))));
    }
    const cname = h("input", { type: "text", id: "new-class-name", placeholder: "e.g. residential", size: 16 });
    const cmsg = h("span", { id: "new-class-msg", class: "muted" });
    panel.append(h("div", { class: "row" }, cname, h("button", { id: "add-class", text: "Add class", onclick: () => {
      const n = cname.value.trim();
      if (!/^[a-z][a-z0-9_]{0,39}$/.test(n)) { cmsg.textContent = "class names: lower-case letters, digits and _, starting with a letter."; return; }
      if (RB.classes[n]) { cmsg.textContent = "that class exists."; return; }
      RB.classes[n] = { values: [] }; renderToml(); drawRulebookAgain();
    } }), cmsg));

    const layerKeys = Object.keys(P.layer_files || {});
    for (const [zn, z] of Object.entries(RB.zones)) {
      const del = h("button", { class: "quiet", text: "Remove", onclick: () => { delete RB.zones[zn]; for (const c of Object.values(RB.classes)) if (c.forbidden_zones) c.forbidden_zones = c.forbidden_zones.filter(x => x !== zn); renderToml(); drawRulebookAgain(); } });
      const body = [txt(z, "label", "Label", { size: 16 })];
      if (z.kind === "easement") {
        body.push(sel(z, "layer", "Layer", layerKeys), sel(z, "derive", "or derive", ["shoreline", "streams"]));
        if (typeof z.width_m !== "object" || z.width_m === null) body.push(num(z, "width_m", "Width m", { min: 0 }));
        else for (const ctx of ["urban", "agricultural", "forest"]) body.push(num(z.width_m, ctx, "Width " + ctx + " m", { min: 0 }));
        const per = h("input", { type: "checkbox", checked: typeof z.width_m === "object" && z.width_m !== null });
        per.addEventListener("change", () => { z.width_m = per.checked ? {} : undefined; if (!per.checked) delete z.width_m; renderToml(); drawRulebookAgain(); });
        body.push(h("label", {}, per, " widths per context"), txt(z, "channel_width_field", "Channel width field", { size: 10 }));
      } else if (z.kind === "flood_polygons") {
        body.push(sel(z, "layer", "Layer", layerKeys), txt(z, "level_field", "Level field", { size: 12 }), num(z, "min_level", "Min. level"));
      } else if (z.kind === "hand") {
        body.push(num(z, "max_hand_m", "Max. HAND m", { min: 0 }), num(z, "channel_area_m2", "Channel area m²", { min: 0 }));
      } else if (z.kind === "sea_rise") {
        body.push(num(z, "datum_m", "Datum m"), num(z, "rise_m", "Rise m", { min: 0 }), num(z, "surge_m", "Surge m", { min: 0 }));
        const sc = h("input", { type: "text", size: 12, value: (z.scenarios_m || []).join(", "), placeholder: "0.5, 1, 2" });
        sc.addEventListener("input", () => { const v = sc.value.split(",").map(s => s.trim()).filter(Boolean).map(Number); if (v.length) z.scenarios_m = v; else delete z.scenarios_m; renderToml(); });
        body.push(h("label", {}, "Scenarios m ", sc));
      }
      panel.append(h("div", { class: "block zone", "data-zone": zn }, h("div", { class: "head" }, h("h3", { text: `Zone ${zn} (${z.kind})` }), del), ...body));
    }
    const zname = h("input", { type: "text", id: "new-zone-name", placeholder: "e.g. flood_high", size: 14 });
    const zkind = h("select", { id: "new-zone-kind" }, KINDS.map(k => h("option", { value: k, text: k })));
    const zmsg = h("span", { class: "muted" });
    panel.append(h("div", { class: "row" }, zname, zkind, h("button", { id: "add-zone", text: "Add zone", onclick: () => {
      const n = zname.value.trim();
      if (!/^[a-z][a-z0-9_]{0,39}$/.test(n)) { zmsg.textContent = "zone names: lower-case letters, digits and _, starting with a letter."; return; }
      RB.zones[n] = { kind: zkind.value }; renderToml(); drawRulebookAgain();
    } }), zmsg));
  }

  function stateForServer() {
    const s = JSON.parse(JSON.stringify(RB)); delete s._pid;
    const used = new Set(Object.values(s.zones || {}).map(z => z.layer).filter(Boolean));
    s.layers = Object.assign({}, s.layers || {});
    for (const k of used) if (!s.layers[k] && P.layer_files[k]) s.layers[k] = P.layer_files[k];
    if (!Object.keys(s.layers).length) delete s.layers;
    if (s.zones && !Object.keys(s.zones).length) delete s.zones;
    if (s.rulebook && s.rulebook.id_field === "") delete s.rulebook.id_field;
    return s;
  }

  let tomlTimer = null;
  let tomlTicket = 0; // the latest check or load; answers to older requests are dropped
  function renderToml() { clearTimeout(tomlTimer); tomlTimer = setTimeout(renderTomlNow, 200); }
  async function renderTomlNow() {
    const pre = document.getElementById("toml-preview"); const st = document.getElementById("rulebook-status");
    if (!pre) return;
    const ticket = ++tomlTicket;
    try {
      const r = await api("POST", `/api/projects/${P.project.id}/rulebook/render`, { state: stateForServer() });
      if (ticket !== tomlTicket) return;
      lastToml = r.toml; showToml(r.toml, r.message);
      st.replaceChildren(r.ok ? msg("good", "The rulebook is valid.", "rulebook-ok") : msg("bad", r.message, "rulebook-error"));
      const dl = document.getElementById("toml-download");
      dl.href = URL.createObjectURL(new Blob([r.toml], { type: "application/toml" }));
      document.getElementById("start-run").disabled = !r.ok;
    } catch (e) { st.replaceChildren(msg("bad", e.message)); }
  }
  function showToml(text, message) {
    const m = (message || "").match(/line (\d+)/);
    const hit = m ? +m[1] : 0;
    document.getElementById("toml-preview").replaceChildren(...text.split("\n").map((ln, i) => h("span", { class: i + 1 === hit ? "hit" : null, text: ln || " " })));
  }
  function drawToml(panel) {
    const load = h("input", { type: "file", id: "toml-load", accept: ".toml,text/plain" });
    load.addEventListener("change", async () => {
      const f = load.files[0]; if (!f) return;
      clearTimeout(tomlTimer);
      const ticket = ++tomlTicket;
      const text = await f.text();
      const r = await api("POST", `/api/projects/${P.project.id}/rulebook/load`, { text });
      if (ticket !== tomlTicket) return;
      const st = document.getElementById("rulebook-status");
      // a refused file leaves the form as it was: the file's own text and the CLI's message (its line marked)
      // stay shown, instead of the form's re-written TOML replacing them a moment later
      if (r.ok && r.state) { RB = Object.assign({ _pid: P.project.id }, r.state); drawRulebookAgain(); }
      showToml(r.toml, r.message);
      st.replaceChildren(r.ok ? msg("good", "Loaded " + f.name + "; the rulebook is valid.", "rulebook-ok") : msg("bad", r.message, "rulebook-error"));
      if (r.ok) renderToml();
    });
    panel.append(h("p", { class: "muted", text: "Written from the form as you type and checked with the same rules (and messages) as `landcheck audit`." }),
      h("div", { id: "rulebook-status" }), h("pre", { class: "toml", id: "toml-preview" }),
      h("div", { class: "row" }, h("a", { class: "btn quiet", id: "toml-download", download: "rulebook.toml", href: "#", text: "Download rulebook.toml" }),
        h("label", {}, "Load an existing one ", load)));
  }

  // ------------------------------------------------------------------ run
  function drawRun(panel) {
    const o = {};
    const conf = h("select", { id: "opt-confidence" }, [["off", "off"], ["rulebook", "from the rulebook's [uncertainty]"], ["custom", "DEM error below"]].map(([v, t]) => h("option", { value: v, text: t })));
    const rmse = h("input", { type: "number", step: "any", id: "opt-rmse", placeholder: "RMSE m" });
    const corr = h("input", { type: "number", step: "any", id: "opt-corr", placeholder: "corr. m" });
    const reals = h("input", { type: "number", id: "opt-realizations", placeholder: "100" });
    const cap = h("select", { id: "opt-capability" }, ["", "planning-6", "fao-2006"].map(v => h("option", { value: v, text: v || "none" })));
    const mmu = h("input", { type: "number", step: "any", id: "opt-mmu", placeholder: "off" });
    const pre = h("input", { type: "text", id: "opt-prescreen", size: 10, placeholder: "parcel id" });
    const tile = h("select", { id: "opt-tile" }, [256, 512, 1024, 2048].map(v => h("option", { value: v, text: v, selected: v === 1024 })));
    const out = h("div", { id: "run-start-msg" });
    const start = h("button", { id: "start-run", text: "Run the audit", disabled: true });
    start.addEventListener("click", async () => {
      Object.assign(o, { confidence: conf.value, rmse_m: rmse.value, corr_length_m: corr.value, realizations: reals.value, capability_scheme: cap.value, draft_mmu_m2: mmu.value, prescreen_parcel: pre.value, tile_cells: tile.value });
      start.disabled = true;
      try { const r = await api("POST", `/api/projects/${P.project.id}/runs`, { rulebook: lastToml, options: o }); location.hash = "#/r/" + r.id; }
      catch (e) { out.replaceChildren(msg("bad", e.message)); start.disabled = false; }
    });
    if (!inputOf("dem").length || !inputOf("parcels").length) panel.append(msg("note", "Upload a DEM and a parcel layer to run."));
    panel.append(h("div", {}, h("label", {}, "Verdict confidence ", conf), rmse, corr, reals),
      h("div", {}, h("label", {}, "Capability map ", cap), h("label", {}, "Drafted reclassification, min. unit m² ", mmu)),
      h("div", {}, h("label", {}, "Pre-screen one parcel ", pre), h("label", {}, "Window size (cells) ", tile)),
      h("div", { class: "row" }, start), out);
  }

  function drawRuns(panel) {
    if (!P.runs.length) { panel.append(h("p", { class: "muted", text: "No runs yet." })); return; }
    panel.append(h("table", {}, h("thead", {}, h("tr", {}, ["Run", "State", "Rulebook", "Started", "Conflicts", ""].map(t => h("th", { text: t })))),
      h("tbody", {}, P.runs.map(r => h("tr", {}, h("td", { text: "#" + r.id }), h("td", {}, h("span", { class: "badge state-" + r.state, text: r.state })),
        h("td", { text: "v" + r.rulebook_version }), h("td", { text: r.started_utc || r.created_utc }),
        h("td", { text: r.summary ? r.summary.totals.verdict_counts.conflict : "–" }), h("td", {}, h("a", { href: "#/r/" + r.id, text: "open" })))))));
  }

  // ------------------------------------------------------------------ one run
  async function runPage(rid, parcelId) {
    const my = routeGen;
    const r = await api("GET", "/api/runs/" + rid);
    const proj = await api("GET", "/api/projects/" + r.project_id);
    if (my !== routeGen) return;
    setCrumbs(h("a", { href: "#/", text: "Projects" }), h("a", { href: "#/p/" + r.project_id, text: proj.project.name }), h("span", { text: "Run #" + rid }));
    const prog = h("section", { class: "panel", id: "progress-panel" });
    const made = h("section", { class: "panel", id: "made-from" });
    view.replaceChildren(h("h1", {}, `Run #${rid} `, h("span", { class: "badge state-" + r.state, id: "run-state", text: r.state })), h("div", { class: "steps" }, prog, made));
    drawMadeFrom(made, r);
    if (r.state === "queued" || r.state === "running") return pollRun(rid, prog);
    drawFinished(prog, r);
    if (r.live && r.live.stages.length) { const bars = h("div", { id: "final-stages" }); drawStages(bars, r); bars.querySelector("#cancel-run").remove(); bars.querySelector("h2").remove(); prog.append(bars); }
    if (r.state === "done") await drawResults(r, parcelId, my);
  }

  function drawMadeFrom(panel, r) {
    const m = r.made_from;
    panel.replaceChildren(h("h2", { text: "Made from" }),
      h("table", { id: "made-from-table" }, h("tbody", {}, m.inputs.map(i => h("tr", {}, h("td", { text: i.role }), h("td", { text: i.name }), h("td", {}, h("code", { text: i.sha256 })))),
        h("tr", {}, h("td", { text: "rulebook" }), h("td", {}, h("a", { href: `/api/projects/${r.project_id}/rulebooks/${m.rulebook.version}.toml`, text: "version " + m.rulebook.version })), h("td", {}, h("code", { text: m.rulebook.sha256 }))))),
      h("p", { class: "muted", id: "run-options", text: "Options: " + optionWords(m.options) + " · landcheck " + m.landcheck }));
  }

  // run options in plain words: "confidence runs: yes, parcel to pre-screen: none"
  function optionWords(opts) {
    const word = v => v === true ? "yes" : v === false ? "no" : v === null || v === undefined || v === "" ? "none"
      : Array.isArray(v) ? (v.length ? v.join(", ") : "none") : String(v);
    const entries = Object.entries(opts || {});
    return entries.length ? entries.map(([k, v]) => k.replace(/_/g, " ") + ": " + word(v)).join("; ") : "none";
  }

  function drawStages(panel, r) {
    const live = r.live || { stages: [], messages: [] };
    const cancel = h("button", { class: "stop", id: "cancel-run", text: "Cancel", onclick: async () => { cancel.disabled = true; await api("POST", `/api/runs/${r.id}/cancel`); } });
    panel.replaceChildren(h("h2", { text: r.state === "queued" ? "Waiting for the project's other run" : "Progress" }),
      ...live.stages.map(s => {
        const frac = s.total ? s.n / s.total : 0;
        const fill = h("div", { class: "fill" + (s.state === "active" && !s.total ? " indet" : "") });
        if (s.total) fill.style.width = (100 * frac).toFixed(1) + "%";
        return h("div", { class: "stage", "data-stage": s.key, "data-state": s.state },
          h("div", { class: "lbl" }, h("span", { text: s.label }), h("span", { class: "muted", text: s.state === "done" ? "done" : s.total ? `${s.n} / ${s.total}` : s.state })),
          h("div", { class: "track", role: "progressbar", "aria-valuemin": 0, "aria-valuemax": 100, "aria-valuenow": s.state === "done" ? 100 : Math.round(100 * frac) }, fill));
      }),
      h("ul", { class: "plain muted" }, (live.messages || []).map(m => h("li", { text: m }))), cancel);
  }

  function pollRun(rid, panel) {
    const my = routeGen;
    const tick = async () => {
      let r;
      try { r = await api("GET", "/api/runs/" + rid); } catch (e) { timer = setTimeout(tick, 1500); return; }
      if (my !== routeGen) return;
      if (r.state === "queued" || r.state === "running") { drawStages(panel, r); document.getElementById("run-state").textContent = r.state; timer = setTimeout(tick, 600); }
      else route();
    };
    tick();
  }

  function drawFinished(panel, r) {
    panel.replaceChildren(h("h2", { text: "Outcome" }));
    if (r.state === "done") {
      const t = r.summary.totals, vc = t.verdict_counts;
      panel.append(msg("good", `Finished ${r.finished_utc}: ${t.parcels} parcels — ${vc.conflict} conflict, ${vc.review} review, ${vc.consistent} consistent, ${vc.no_data} no data, ${vc.no_rule} without a rule.`, "run-done"));
      for (const w of r.summary.warnings || []) panel.append(msg("note", w));
      panel.append(h("div", { class: "row" }, h("a", { class: "btn", id: "download-zip", href: `/runs/${r.id}/download.zip`, text: "Download everything (.zip)" }),
        h("a", { class: "btn quiet", href: `/runs/${r.id}/files/report.html`, target: "_blank", rel: "noopener", text: "Open the report alone" })),
        h("details", {}, h("summary", { text: `Files (${r.outputs.length})` }), h("ul", { class: "plain", id: "file-list" }, r.outputs.map(o =>
          h("li", {}, h("a", { href: `/runs/${r.id}/files/${o.path}`, download: o.path.split("/").pop(), text: o.path }), h("span", { class: "muted", text: ` ${fmtNum(o.size / 1024, 1)} KiB · ${o.sha256.slice(0, 12)}…` }))))));
    } else {
      panel.append(msg("bad", r.message || r.state, "run-message"));
    }
  }

  async function drawResults(r, parcelId, my) {
    const [tab, map] = await Promise.all([api("GET", `/api/runs/${r.id}/parcels`), api("GET", `/api/runs/${r.id}/map`)]);
    if (my !== routeGen) return;
    const byId = Object.fromEntries(tab.rows.map(row => [row.parcel_id, row]));
    const classes = [...new Set(tab.rows.map(x => x.class_name))].sort();
    const fv = h("select", { id: "filter-verdict" }, h("option", { value: "", text: "all verdicts" }), VERDICTS.map(v => h("option", { value: v, text: say(v) })));
    const fc = h("select", { id: "filter-class" }, h("option", { value: "", text: "all classes" }), classes.map(v => h("option", { value: v, text: v })));
    const NS = "http://www.w3.org/2000/svg";
    const svg = document.createElementNS(NS, "svg");
    svg.setAttribute("class", "parcels"); svg.setAttribute("id", "parcel-map");
    svg.setAttribute("viewBox", `0 0 ${map.width.toFixed(1)} ${map.height.toFixed(1)}`);
    svg.setAttribute("role", "img"); svg.setAttribute("aria-label", "Parcels coloured by verdict");
    const paths = {};
    for (const s of map.shapes) {
      const p = document.createElementNS(NS, "path");
      p.setAttribute("d", s.d); p.setAttribute("data-id", s.id); p.setAttribute("data-verdict", s.verdict); p.setAttribute("data-class", s.class_name);
      p.setAttribute("fill", getComputedStyle(document.documentElement).getPropertyValue("--v-" + s.verdict).trim() || "#999");
      const title = document.createElementNS(NS, "title"); title.textContent = `parcel ${s.id}: ${say(s.verdict)}`; p.append(title);
      p.addEventListener("click", () => { location.hash = `#/r/${r.id}/parcel/${encodeURIComponent(s.id)}`; });
      svg.append(p); paths[s.id] = p;
    }
    const panelBox = h("div", { id: "parcel-panel" });
    const tbody = h("tbody", { id: "parcel-rows" });
    const cols = ["parcel_id", "class_name", "verdict", "area_m2", "share_over_limit", "conflict_m2", "reasons"].filter(c => tab.columns.includes(c));
    const apply = () => {
      tbody.replaceChildren();
      let n = 0;
      for (const row of tab.rows) {
        const ok = (!fv.value || row.verdict === fv.value) && (!fc.value || row.class_name === fc.value);
        if (paths[row.parcel_id]) paths[row.parcel_id].classList.toggle("dim", !ok);
        if (!ok) continue;
        n++;
        if (n <= 2000) tbody.append(h("tr", { class: row.parcel_id === parcelId ? "sel" : null, onclick: () => { location.hash = `#/r/${r.id}/parcel/${encodeURIComponent(row.parcel_id)}`; } },
          cols.map(c => h("td", {}, c === "verdict" ? badge(row[c]) : fieldValue(c, row[c])))));
      }
      document.getElementById("filter-count").textContent = `${n.toLocaleString("en")} ${n === 1 ? "parcel" : "parcels"}`;
    };
    fv.addEventListener("change", apply); fc.addEventListener("change", apply);
    const legend = h("div", { class: "legend" }, VERDICTS.map(v => h("span", {}, badge(v))));
    const results = h("section", { class: "panel wide", id: "results" }, h("h2", { text: "Explore" }),
      h("div", { class: "row" }, h("label", {}, "Verdict ", fv), h("label", {}, "Class ", fc), h("span", { id: "filter-count", class: "muted" })),
      h("div", { class: "mapwrap" }, h("div", {}, svg, legend, map.truncated ? msg("note", "The map shows the first parcels only; the table and the report have all.") : null), panelBox),
      h("div", { class: "scroll" }, h("table", { id: "parcel-table" }, h("thead", {}, h("tr", {}, cols.map(c => h("th", { text: field(c) })))), tbody)));
    const report = h("section", { class: "panel wide", id: "report-panel" }, h("h2", { text: "Report" }),
      h("iframe", { class: "report", id: "report-frame", src: `/runs/${r.id}/files/report.html`, title: "The run's report", sandbox: "allow-scripts allow-popups allow-downloads" }));
    view.querySelector(".steps").append(results, report);
    apply();
    if (parcelId && byId[parcelId]) {
      const row = byId[parcelId];
      if (paths[parcelId]) paths[parcelId].classList.add("sel");
      const pre = r.outputs.find(o => o.path === "prescreen/prescreen.html");
      panelBox.replaceChildren(h("h3", {}, "Parcel ", h("span", { id: "panel-id", text: parcelId }), " ", h("span", { id: "panel-verdict", class: "badge v-" + row.verdict, text: say(row.verdict) })),
        h("dl", { class: "facts", id: "parcel-facts" }, Object.entries(row).flatMap(([k, v]) => [h("dt", { text: field(k) }), h("dd", { text: fieldValue(k, v) })])),
        ...(pre ? [h("a", { href: `/runs/${r.id}/files/prescreen/prescreen.html`, target: "_blank", rel: "noopener", text: "Open the pre-screen page" })] : []));
      if (paths[parcelId]) svg.append(paths[parcelId]);
    } else {
      panelBox.replaceChildren(h("p", { class: "muted", text: "Click a parcel on the map or in the table to see its figures." }));
    }
  }

  route();
})();
