//! The web page in a real browser: Debian's headless Chromium driven over WebDriver (chromedriver
//! on a random port) against the real server on a real SQLite file, fed through the real ingest
//! API with two published worked examples as station values:
//!
//! * Leys et al. (2013), J. Exp. Soc. Psychol. 49(4), 764–766, the values 1, 3, 3, 6, 8, 10, 10,
//!   1000 as eight stations' PM2.5 in each of three intervals. Per interval only 1000 is set aside
//!   (modified z-score 191.36 > 3.5); the median of the other seven is 6 and their 95 % interval
//!   [1, 10]; the unchecked mean of all eight is 130.125; overturning the 1000 makes the median of
//!   all eight 7 (numpy 2.4 `np.median`, `np.mean`; the figures of consensor-core's
//!   `tests/interval.rs`, printed by `tools/reference/interval_points.py`).
//! * The MASS `chem` data (24 copper determinations, Venables & Ripley; as printed in the
//!   statsmodels `robust.scale.huber` example) as 24 stations' air temperatures: 5.28 and 28.95 are
//!   set aside, the median of the other 22 is 3.235 (same sources).
//!
//! The tests check what a person would: the overview lists every area with those numbers, the area
//! chart has the median line, both bands, the unchecked mean and the set-aside markers (read from
//! the chart library's own objects and legend), an overturn typed and clicked in the page changes
//! the API's answer and the chart, the browser logged no error, and the page loaded nothing from
//! outside this server (the browser runs with every host name but 127.0.0.1 unresolvable).
//! Screenshots go to `$CONSENSOR_WEB_SCREENSHOTS`, or `$CARGO_TARGET_DIR/web-screenshots`, or
//! `target/web-screenshots`.

mod common;

use std::path::PathBuf;
use std::time::{Duration, Instant};

use common::{readings_at, wait_until_computed, TestServer, ADMIN, FAST_WORKER, LEYS};
use consensor_store::testing::TestDatabase;
use fantoccini::{Client, ClientBuilder, Locator};
use serde_json::{json, Value};

/// MASS `chem` (Venables & Ripley), as in the statsmodels `robust.scale.huber` example.
const CHEM: [f64; 24] = [
    2.20, 2.20, 2.4, 2.4, 2.5, 2.7, 2.8, 2.9, 3.03, 3.03, 3.10, 3.37, 3.4, 3.4, 3.4, 3.5, 3.6, 3.7,
    3.7, 3.7, 3.7, 3.77, 5.28, 28.95,
];

/// How long any one thing in the page may take to appear.
const PAGE_WAIT: Duration = Duration::from_secs(30);

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_page_shows_and_reviews_the_worked_examples() {
    let server = TestServer::start(TestDatabase::sqlite(), &[FAST_WORKER]).await;
    load_worked_examples(&server).await;
    let (operator_id, operator) = server.token("operator", &[]).await;
    // The three VB-08 readings of 1000, one per interval, oldest first.
    let (status, listed) = server.get("/v1/set-aside?station=VB-08", Some(ADMIN)).await;
    assert_eq!(status, 200, "{listed}");
    let far: Vec<i64> = listed["items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|item| {
            assert_eq!(item["rule"], "far_from_consensus", "{item}");
            item["reading_id"].as_i64().unwrap()
        })
        .collect();
    assert_eq!(far.len(), 3, "{listed}");

    let browser = Browser::start().await;
    let page = &browser.client;

    // The overview without a token: the server does not allow public reading, so the page asks
    // for one and shows nothing.
    page.goto(&server.url("/")).await.unwrap();
    wait_for_text(page, "#view-state", "needs an access token").await;
    assert!(page
        .find_all(Locator::Css("section.area-card"))
        .await
        .unwrap()
        .is_empty());

    // Typing the token and pressing the button loads every area.
    type_into(page, "#token-input", &operator).await;
    click(page, "#token-use").await;
    wait_ready(page, "overview", "the overview").await;
    let areas = page
        .execute(
            "return [...document.querySelectorAll('section.area-card')].map(s => s.dataset.area);",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(
        areas,
        json!(["ostmarrow-flats", "tarnwhistle-heights", "velloran-basin"])
    );
    // Leys et al.: median 6 of the seven kept, one station set aside.
    assert_eq!(
        overview_row(page, "velloran-basin", "pm2_5").await,
        json!({"median": "6 ug/m3", "status": "ok", "used": "7", "set-aside": "1"})
    );
    // chem: median 3.235 of the 22 kept, two set aside.
    assert_eq!(
        overview_row(page, "ostmarrow-flats", "air_temperature").await,
        json!({"median": "3.235 Cel", "status": "ok", "used": "22", "set-aside": "2"})
    );
    assert_eq!(
        text_of(page, "section[data-area='tarnwhistle-heights'] p.empty").await,
        "No computed results yet."
    );
    // The caution is on the page.
    let caution = text_of(page, "p.caution").await;
    assert!(
        caution.contains("not a regulatory measurement")
            && caution.contains("defer to local authorities"),
        "{caution}"
    );
    browser.screenshot("overview.png").await;

    // The area view, reached by its link.
    click(page, "section[data-area='velloran-basin'] h2 a").await;
    let chart = area_chart(page, "pm2_5").await;
    check_consensus_chart(&chart, &[6.0, 6.0, 6.0], &far);
    // The chart library drew one marker per reading, inside the plot area.
    let drawn = page
        .execute(
            "const chart = Chart.getChart(document.getElementById('chart-pm2_5'));
             const index = chart.data.datasets.findIndex(d => d.role === 'set-aside');
             const area = chart.chartArea;
             return chart.getDatasetMeta(index).data.map(p =>
               p.x >= area.left && p.x <= area.right && p.y >= area.top && p.y <= area.bottom);",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(drawn, json!([true, true, true]));
    // Keyboard: the focused chart steps its tooltip through the markers with the arrow keys.
    let canvas = page.find(Locator::Css("#chart-pm2_5")).await.unwrap();
    canvas.send_keys("\u{E014}").await.unwrap(); // WebDriver's ArrowRight key
    let tooltip = wait_for(
        page,
        "const chart = Chart.getChart(document.getElementById('chart-pm2_5'));
         const active = chart.tooltip.getActiveElements();
         return active.length ? chart.tooltip.body.flatMap(b => b.lines).join(' ') : null;",
        "a tooltip from the keyboard",
    )
    .await;
    let tooltip = tooltip.as_str().unwrap();
    assert!(
        tooltip.contains("VB-08") && tooltip.contains("far from consensus"),
        "{tooltip}"
    );
    // The tooltip's reason is the API's sentence, with the score in it.
    assert!(tooltip.contains("191.362"), "{tooltip}");
    browser.screenshot("area-view.png").await;

    // The review queue, filtered to this area and quantity through its URL.
    page.goto(&server.url("/review?area=velloran-basin&quantity=pm2_5"))
        .await
        .unwrap();
    wait_for(
        page,
        "return document.body.dataset.ready === 'review'
           && document.getElementById('context-chart').dataset.state === 'ready';",
        "the review queue",
    )
    .await;
    let rows = page
        .execute(
            "return [...document.querySelectorAll('#queue-body tr')].map(r => Number(r.dataset.readingId));",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(rows, json!(far));
    let filters = page
        .execute(
            "return ['filter-area','filter-quantity','filter-station','filter-rule']
               .map(id => document.getElementById(id).value);",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(filters, json!(["velloran-basin", "pm2_5", "", ""]));
    // The rule filter keeps only the rows of its rule (all three here; none for `step`).
    select_option(page, "#filter-rule", "step").await;
    wait_for_text(page, "#view-state", "Nothing pending").await;
    select_option(page, "#filter-rule", "far_from_consensus").await;
    wait_for(
        page,
        "return document.querySelectorAll('#queue-body tr').length === 3;",
        "the rows of far_from_consensus",
    )
    .await;

    // Overturn the middle interval's 1000 with a note, by typing and clicking.
    let middle = far[1];
    let note = "checked by hand: the page test overturns this one";
    type_into(
        page,
        &format!("tr[data-reading-id='{middle}'] input.note"),
        note,
    )
    .await;
    click(
        page,
        &format!("tr[data-reading-id='{middle}'] button.overturn"),
    )
    .await;
    wait_for(
        page,
        &format!("return document.body.dataset.lastDecision === '{middle}:overturn:2';"),
        "the recomputed interval",
    )
    .await;
    let decided = text_of(page, "#decision-state").await;
    // Leys et al. with the 1000 used again: the median of all eight is 7 (numpy `np.median`).
    assert!(
        decided.contains("revision 2") && decided.contains("median 7 ug/m3 from 8 stations"),
        "{decided}"
    );

    // The API's answer changed: the reading is overturned, with the note and the operator's id.
    let (status, overturned) = server
        .get("/v1/set-aside?review=overturned", Some(ADMIN))
        .await;
    assert_eq!(status, 200, "{overturned}");
    let items = overturned["items"].as_array().unwrap();
    assert_eq!(items.len(), 1, "{overturned}");
    assert_eq!(items[0]["reading_id"], middle);
    assert_eq!(items[0]["review"]["note"], note);
    assert_eq!(items[0]["review"]["by"], operator_id.as_str());
    // And the chart changed: the overturned reading has no marker, the median moved to 7.
    let context = chart_summary(page, "context-chart").await;
    check_consensus_chart(&context, &[6.0, 7.0, 6.0], &[far[0], far[2]]);
    browser.screenshot("review-after-overturn.png").await;

    // The area view shows the same change.
    page.goto(&server.url("/areas/velloran-basin"))
        .await
        .unwrap();
    let chart = area_chart(page, "pm2_5").await;
    check_consensus_chart(&chart, &[6.0, 7.0, 6.0], &[far[0], far[2]]);

    // The station view of VB-08: its value 1000 against the area median, the residual and the
    // history of its three set-aside readings, one of them overturned.
    page.goto(&server.url("/stations/VB-08")).await.unwrap();
    wait_ready(page, "station", "the station view").await;
    let values = chart_summary(page, "values-chart").await;
    assert_eq!(ys(&values, "station-value"), [1000.0, 1000.0, 1000.0]);
    assert_eq!(ys(&values, "area-median"), [6.0, 7.0, 6.0]);
    let residual = chart_summary(page, "residual-chart").await;
    assert_eq!(ys(&residual, "residual"), [994.0, 993.0, 994.0]);
    // Residuals 994, 993, 994 ten minutes apart: the pairwise slopes are −0.1, 0 and +0.1 per
    // minute, whose median, the Theil–Sen slope (Sen 1968), is 0; the line goes through the
    // median residual 994 (computed by hand from the definition).
    assert_eq!(ys(&residual, "drift"), [994.0, 994.0, 994.0]);
    let history = page
        .execute(
            "return [...document.querySelectorAll('#history-body tr')]
               .map(r => [Number(r.dataset.readingId), r.lastElementChild.textContent]);",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(
        history,
        json!([
            [far[2], "pending"],
            [middle, format!("overturned: {note}")],
            [far[0], "pending"]
        ])
    );
    browser.screenshot("station-view.png").await;

    // Readable on a phone: at 390 px nothing makes the page scroll sideways.
    page.set_window_size(390, 844).await.unwrap();
    page.goto(&server.url("/areas/velloran-basin"))
        .await
        .unwrap();
    area_chart(page, "pm2_5").await;
    let fits = page
        .execute(
            "return document.documentElement.scrollWidth <= document.documentElement.clientWidth;",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(fits, json!(true));
    browser.screenshot("area-view-phone.png").await;

    // Nothing came from anywhere but this server.
    let foreign = page
        .execute(
            "return performance.getEntriesByType('resource').map(e => e.name)
               .filter(name => !name.startsWith(location.origin + '/'));",
            vec![],
        )
        .await
        .unwrap();
    assert_eq!(foreign, json!([]));
    for path in ["/", "/areas/velloran-basin", "/review", "/stations/VB-08"] {
        assert_self_contained(&server, path).await;
    }

    browser.stop_without_errors().await;
    server.stop().await;
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn with_public_reading_the_page_needs_no_token_but_deciding_does() {
    let server = TestServer::start(
        TestDatabase::sqlite(),
        &[FAST_WORKER, ("CONSENSOR_PUBLIC_READ", "true")],
    )
    .await;
    load_worked_examples(&server).await;
    let browser = Browser::start().await;
    let page = &browser.client;

    page.goto(&server.url("/")).await.unwrap();
    wait_ready(page, "overview", "the overview").await;
    assert_eq!(
        overview_row(page, "velloran-basin", "pm2_5").await,
        json!({"median": "6 ug/m3", "status": "ok", "used": "7", "set-aside": "1"})
    );
    wait_for_text(page, "#token-state", "anyone may read").await;

    // Reading the queue works; deciding without a token is refused by the page before any request.
    page.goto(&server.url("/review?area=velloran-basin"))
        .await
        .unwrap();
    wait_for(
        page,
        "return document.body.dataset.ready === 'review'
           && document.querySelectorAll('#queue-body tr').length === 3;",
        "the review queue",
    )
    .await;
    click(page, "#queue-body tr:first-child button.uphold").await;
    wait_for_text(page, "#decision-state", "needs an operator or admin token").await;
    let (status, pending) = server.get("/v1/set-aside?review=pending", None).await;
    assert_eq!(status, 200, "{pending}");
    assert_eq!(pending["items"].as_array().unwrap().len(), 3 + 2);

    // An unknown area is the API's answer, shown in the page; a malformed id is a 404 page.
    page.goto(&server.url("/areas/no-such-area")).await.unwrap();
    wait_for_text(page, "#view-state", "There is no area").await;
    let response = server
        .client
        .get(server.url("/areas/not%20an%20id"))
        .send()
        .await
        .unwrap();
    assert_eq!(response.status(), 404);
    assert!(response.text().await.unwrap().contains("not an area id"));

    // The vendored library is served from here with a year's cache, under a versioned URL.
    let html = page_source(&server, "/").await;
    let script = html
        .split("src=\"")
        .skip(1)
        .map(|rest| rest.split('"').next().unwrap().to_owned())
        .find(|src| src.starts_with("/assets/chartjs/chart.umd.min.js?v="))
        .expect("the page links the chart library");
    let response = server.client.get(server.url(&script)).send().await.unwrap();
    assert_eq!(response.status(), 200);
    assert_eq!(
        response.headers()["cache-control"],
        "public, max-age=31536000, immutable"
    );
    assert_eq!(
        response.headers()["content-type"],
        "text/javascript; charset=utf-8"
    );

    browser.screenshot("public-overview.png").await;
    browser.stop_without_errors().await;
    server.stop().await;
}

/// Makes a screenshot of the demo's area view for the README (`docs/area-view.png`): runs the real
/// `consensor demo` on a fresh temporary database with public reading, opens the area view of
/// `velloran-basin` over the last 24 hours and saves what the browser shows. Ignored in the test
/// suite (it takes the demo's minute of computing); `tools/screenshot.sh` runs it.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "makes docs/area-view.png from the demo; run by tools/screenshot.sh"]
async fn demo_area_view_screenshot() {
    use std::io::{BufRead, BufReader};
    let directory = tempfile::tempdir().unwrap();
    let database = directory.path().join("demo.db");
    let mut demo = std::process::Command::new(env!("CARGO_BIN_EXE_consensor"))
        .args(["demo", "--listen", "127.0.0.1:0", "--database"])
        .arg(&database)
        .env("CONSENSOR_PUBLIC_READ", "true")
        .env("RUST_LOG", "warn")
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::inherit())
        .spawn()
        .expect("start consensor demo");
    let stdout = demo.stdout.take().unwrap();
    // The demo is stopped however the test ends.
    let _demo = EndOnDrop(demo);
    let (address_tx, address_rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in BufReader::new(stdout).lines().map_while(Result::ok) {
            if let Some(address) = line.split("listening on ").nth(1) {
                let _ = address_tx.send(address.trim().to_owned());
            }
        }
    });
    let base = address_rx
        .recv_timeout(Duration::from_secs(600))
        .expect("the demo did not start serving within 10 minutes");
    let browser = Browser::start().await;
    let page = &browser.client;
    page.set_window_size(1280, 1400).await.unwrap();
    page.goto(&format!("{base}/areas/velloran-basin"))
        .await
        .unwrap();
    wait_ready(page, "area", "the demo's area view").await;
    let png = page.screenshot().await.unwrap();
    let target = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../docs/area-view.png");
    std::fs::create_dir_all(target.parent().unwrap()).unwrap();
    std::fs::write(&target, png).unwrap();
    eprintln!("wrote {}", target.display());
    browser.stop_without_errors().await;
}

/// A child process killed and reaped when dropped.
struct EndOnDrop(std::process::Child);

impl Drop for EndOnDrop {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

// -------------------------------------------------------------------------------------------------
// The data
// -------------------------------------------------------------------------------------------------

/// Three areas (one with no readings), the Leys et al. values as eight PM2.5 stations in three
/// intervals and the chem values as 24 temperature stations in one, posted through the ingest API;
/// returns once the worker has computed everything.
async fn load_worked_examples(server: &TestServer) {
    let vb: Vec<String> = (1..=8).map(|i| format!("VB-{i:02}")).collect();
    let of: Vec<String> = (1..=24).map(|i| format!("OF-{i:02}")).collect();
    let th: Vec<String> = (1..=3).map(|i| format!("TH-{i:02}")).collect();
    for (area, stations) in [
        ("velloran-basin", &vb),
        ("ostmarrow-flats", &of),
        ("tarnwhistle-heights", &th),
    ] {
        let ids: Vec<&str> = stations.iter().map(String::as_str).collect();
        server.network(area, &ids).await;
    }
    // Each reading at the middle of its 10-minute interval: T0+5, T0+15, T0+25 minutes.
    let mut readings: Vec<Value> = [5, 15, 25]
        .into_iter()
        .flat_map(|minute| readings_at("pm2_5", &vb, &LEYS, minute))
        .collect();
    readings.extend(readings_at("air_temperature", &of, &CHEM, 5));
    let body = server.post_readings(readings).await;
    assert_eq!(body["accepted"], 3 * 8 + 24, "{body}");
    wait_until_computed(server).await;
}

// -------------------------------------------------------------------------------------------------
// Reading the page
// -------------------------------------------------------------------------------------------------

/// The cells of one overview row.
async fn overview_row(page: &Client, area: &str, quantity: &str) -> Value {
    page.execute(
        "const row = document.querySelector(
           `section[data-area='${arguments[0]}'] tr[data-quantity='${arguments[1]}']`);
         if (!row) return null;
         const cell = f => row.querySelector(`[data-field='${f}']`).textContent;
         return {median: cell('median'), status: cell('status'), used: cell('used'),
                 'set-aside': cell('set-aside')};",
        vec![json!(area), json!(quantity)],
    )
    .await
    .unwrap()
}

/// Waits for the area view's chart of `quantity` and reads it.
async fn area_chart(page: &Client, quantity: &str) -> Value {
    wait_for(
        page,
        &format!(
            "return document.body.dataset.ready === 'area'
               && document.getElementById('chart-{quantity}')?.dataset.state === 'ready';"
        ),
        "the area chart",
    )
    .await;
    chart_summary(page, &format!("chart-{quantity}")).await
}

/// What the chart library holds for the chart on the canvas `id`: each series with its role, fill,
/// point style, y values and reading ids, and the legend's entries.
async fn chart_summary(page: &Client, id: &str) -> Value {
    page.execute(
        "const chart = Chart.getChart(document.getElementById(arguments[0]));
         if (!chart) return null;
         return {
           datasets: chart.data.datasets.map(d => ({
             role: d.role, label: d.label, rule: d.rule || null,
             fill: d.fill === undefined ? null : String(d.fill),
             pointStyle: typeof d.pointStyle === 'string' ? d.pointStyle : null,
             ys: d.data.map(p => p.y),
             ids: d.data.map(p => (p.item ? p.item.reading_id : null)),
           })),
           legend: chart.legend.legendItems.map(item => ({text: item.text, pointStyle: item.pointStyle})),
         };",
        vec![json!(id)],
    )
    .await
    .unwrap()
}

/// The y values of the chart's series `role` (JSON numbers compared as numbers: the browser
/// sends 6 where Rust would write 6.0).
fn ys(chart: &Value, role: &str) -> Vec<f64> {
    dataset(chart, role)["ys"]
        .as_array()
        .unwrap()
        .iter()
        .map(|y| y.as_f64().unwrap_or(f64::NAN))
        .collect()
}

fn dataset<'a>(chart: &'a Value, role: &str) -> &'a Value {
    chart["datasets"]
        .as_array()
        .unwrap()
        .iter()
        .find(|d| d["role"] == role)
        .unwrap_or_else(|| panic!("no {role} series in {chart:#}"))
}

/// The area chart of the Leys et al. intervals: the median line, the median range and 95 %
/// interval bands, the unchecked mean, and the VB-08 readings of 1000 as triangle markers.
fn check_consensus_chart(chart: &Value, medians: &[f64], marker_ids: &[i64]) {
    assert_eq!(ys(chart, "median"), medians);
    // n = 7 kept: the 95 % interval of the median is [X(1), X(7)] = [1, 10], coverage
    // 1 − 2/128 = 98.4 % (binomial order statistics; scipy `binom.cdf`, via consensor-core's
    // tests/interval.rs). With the 1000 overturned, n = 8: [X(1), X(8)] = [1, 1000], as X(2)..X(7)
    // covers only 1 − 2·9/256 = 93.0 % (computed by hand from the same definition).
    let ci_high: Vec<f64> = medians
        .iter()
        .map(|m| if *m == 7.0 { 1000.0 } else { 10.0 })
        .collect();
    let ci95 = dataset(chart, "ci95");
    assert_eq!(ys(chart, "ci95"), ci_high);
    assert_eq!(
        ci95["fill"], "+1",
        "the 95 % band fills down to its lower edge"
    );
    assert_eq!(ys(chart, "ci95-low"), [1.0, 1.0, 1.0]);
    // The median range: equal ends for odd n (6, 6); the two middle values for even n (6, 8).
    let range = dataset(chart, "median-range");
    assert_eq!(range["fill"], "+1");
    let range_high: Vec<f64> = medians
        .iter()
        .map(|m| if *m == 7.0 { 8.0 } else { 6.0 })
        .collect();
    assert_eq!(ys(chart, "median-range"), range_high);
    assert_eq!(ys(chart, "median-range-low"), [6.0, 6.0, 6.0]);
    // The unchecked mean of all eight: np.mean(LEYS) = 130.125, whatever the review said.
    assert_eq!(ys(chart, "mean-all"), [130.125, 130.125, 130.125]);
    let markers = dataset(chart, "set-aside");
    assert_eq!(markers["rule"], "far_from_consensus");
    assert_eq!(markers["pointStyle"], "triangle");
    assert_eq!(markers["ids"], json!(marker_ids));
    assert_eq!(ys(chart, "set-aside"), vec![1000.0; marker_ids.len()]);
    assert_eq!(
        legend(chart, "text"),
        [
            "95 % interval of the median",
            "Median range (median_low to median_high)",
            "Median",
            "Mean of all stations, unchecked",
            "Set aside: far from consensus",
        ]
    );
    // The legend draws each series in its own style: bands as boxes, lines as lines, the marker in
    // its shape.
    assert_eq!(
        legend(chart, "pointStyle"),
        ["rect", "rect", "line", "line", "triangle"]
    );
}

/// Checks that the page at `path` and the script and style sheet it links name no other host: no
/// absolute URL at all in the HTML or our own files, and every `src`/`href` a path on this server.
async fn assert_self_contained(server: &TestServer, path: &str) {
    let html = page_source(server, path).await;
    for scheme in ["http://", "https://", "//cdn", "url("] {
        assert!(!html.contains(scheme), "{path} contains {scheme:?}");
    }
    for attribute in ["src=\"", "href=\""] {
        for rest in html.split(attribute).skip(1) {
            let link = rest.split('"').next().unwrap();
            assert!(
                (link.starts_with('/') && !link.starts_with("//"))
                    || link.starts_with('#')
                    || link == "data:,",
                "{path} links {link:?}"
            );
        }
    }
    for own in ["consensor.js", "consensor.css"] {
        let link = html
            .split('"')
            .find(|part| part.starts_with(&format!("/assets/{own}?v=")))
            .unwrap_or_else(|| panic!("{path} does not link {own}"));
        let text = page_source(server, link).await;
        assert!(
            !text.contains("http://") && !text.contains("https://"),
            "{own} names another host"
        );
    }
}

/// The body of `GET path` as text.
async fn page_source(server: &TestServer, path: &str) -> String {
    server
        .client
        .get(server.url(path))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap()
}

/// The entries' `field` (`text` or `pointStyle`) of the chart's legend, in order.
fn legend<'a>(chart: &'a Value, field: &str) -> Vec<&'a str> {
    chart["legend"]
        .as_array()
        .unwrap()
        .iter()
        .map(|item| item[field].as_str().unwrap())
        .collect()
}

async fn click(page: &Client, selector: &str) {
    page.find(Locator::Css(selector))
        .await
        .unwrap()
        .click()
        .await
        .unwrap();
}

async fn type_into(page: &Client, selector: &str, text: &str) {
    page.find(Locator::Css(selector))
        .await
        .unwrap()
        .send_keys(text)
        .await
        .unwrap();
}

async fn text_of(page: &Client, selector: &str) -> String {
    page.find(Locator::Css(selector))
        .await
        .unwrap()
        .text()
        .await
        .unwrap()
}

async fn select_option(page: &Client, select: &str, value: &str) {
    page.find(Locator::Css(select))
        .await
        .unwrap()
        .select_by_value(value)
        .await
        .unwrap();
}

/// Polls `script` until it returns something other than null or false.
async fn wait_for(page: &Client, script: &str, what: &str) -> Value {
    let deadline = Instant::now() + PAGE_WAIT;
    loop {
        let value = page.execute(script, vec![]).await.unwrap();
        if !value.is_null() && value != Value::Bool(false) {
            return value;
        }
        if Instant::now() > deadline {
            let state = page
                .execute(
                    "return [document.getElementById('view-state')?.textContent,
                             document.getElementById('decision-state')?.textContent];",
                    vec![],
                )
                .await
                .unwrap_or(Value::Null);
            panic!("timed out waiting for {what}; the page says {state}");
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// Waits until the page says (`body[data-ready]`) that `view` has loaded.
async fn wait_ready(page: &Client, view: &str, what: &str) {
    wait_for(
        page,
        &format!("return document.body.dataset.ready === '{view}';"),
        what,
    )
    .await;
}

async fn wait_for_text(page: &Client, selector: &str, text: &str) {
    wait_for(
        page,
        &format!(
            "const node = document.querySelector({selector:?});
             return !!node && node.textContent.includes({text:?});"
        ),
        &format!("{selector} to say {text:?}"),
    )
    .await;
}

// -------------------------------------------------------------------------------------------------
// The browser
// -------------------------------------------------------------------------------------------------

/// Headless Chromium under a chromedriver of our own on a random port.
struct Browser {
    client: Client,
    driver: tokio::process::Child,
    /// The process group of chromedriver and the browser (chromedriver's process id).
    group: u32,
    driver_url: String,
    screenshots: PathBuf,
}

impl Browser {
    async fn start() -> Browser {
        let chromium =
            std::env::var("CONSENSOR_CHROMIUM").unwrap_or_else(|_| "/usr/bin/chromium".into());
        let chromedriver = std::env::var("CONSENSOR_CHROMEDRIVER")
            .unwrap_or_else(|_| "/usr/bin/chromedriver".into());
        for program in [&chromium, &chromedriver] {
            assert!(
                std::path::Path::new(program).exists(),
                "{program} is missing: install Debian's chromium and chromium-driver \
                 (scripts/test does), or set CONSENSOR_CHROMIUM / CONSENSOR_CHROMEDRIVER"
            );
        }
        let port = std::net::TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port();
        // chromedriver and the browser it starts run in a process group of their own, so that
        // the whole group can be ended however the test ends (see `Drop`).
        let driver = tokio::process::Command::new(&chromedriver)
            .arg(format!("--port={port}"))
            .arg("--allowed-ips=127.0.0.1")
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::null())
            .process_group(0)
            .kill_on_drop(true)
            .spawn()
            .expect("start chromedriver");
        let group = driver.id().expect("chromedriver's process id");
        let driver_url = format!("http://127.0.0.1:{port}");
        let deadline = Instant::now() + PAGE_WAIT;
        while tokio::net::TcpStream::connect(("127.0.0.1", port))
            .await
            .is_err()
        {
            assert!(Instant::now() < deadline, "chromedriver did not start");
            tokio::time::sleep(Duration::from_millis(25)).await;
        }
        let capabilities = json!({
            "browserName": "chrome",
            "goog:chromeOptions": {
                "binary": chromium,
                "args": [
                    "--headless=new",
                    // The tests run as root, where Chromium's sandbox cannot start.
                    "--no-sandbox",
                    "--disable-dev-shm-usage",
                    "--disable-gpu",
                    "--window-size=1280,1000",
                    "--lang=en-GB",
                    "--no-first-run",
                    "--disable-background-networking",
                    "--disable-component-update",
                    "--disable-sync",
                    "--disable-extensions",
                    // No crash reporter: it would leave its own session behind.
                    "--disable-crash-reporter",
                    "--disable-breakpad",
                    // No network but this machine: every other host name fails to resolve, so a
                    // page that needed the internet would break (and log errors) here.
                    "--host-resolver-rules=MAP * ~NOTFOUND , EXCLUDE 127.0.0.1",
                ],
            },
            "goog:loggingPrefs": {"browser": "ALL"},
        });
        let capabilities = match capabilities {
            Value::Object(map) => map,
            _ => unreachable!(),
        };
        let client = ClientBuilder::new(hyper_util::client::legacy::connect::HttpConnector::new())
            .capabilities(capabilities)
            .connect(&driver_url)
            .await
            .expect("start a Chromium session");
        let screenshots = std::env::var_os("CONSENSOR_WEB_SCREENSHOTS")
            .map(PathBuf::from)
            .or_else(|| {
                std::env::var_os("CARGO_TARGET_DIR")
                    .map(|dir| PathBuf::from(dir).join("web-screenshots"))
            })
            .unwrap_or_else(|| {
                PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../target/web-screenshots")
            });
        std::fs::create_dir_all(&screenshots).expect("screenshot folder");
        Browser {
            client,
            driver,
            group,
            driver_url,
            screenshots,
        }
    }

    async fn screenshot(&self, name: &str) {
        let png = self.client.screenshot().await.expect("screenshot");
        let path = self.screenshots.join(name);
        std::fs::write(&path, png).expect("write screenshot");
        eprintln!("screenshot: {}", path.display());
    }

    /// The browser log's entries at level SEVERE (console errors, failed loads, policy
    /// violations), through chromedriver's log endpoint, which WebDriver's standard lacks.
    async fn console_errors(&self) -> Vec<Value> {
        let session = self.client.session_id().await.unwrap().expect("a session");
        let response: Value = reqwest::Client::new()
            .post(format!("{}/session/{session}/se/log", self.driver_url))
            .json(&json!({"type": "browser"}))
            .send()
            .await
            .expect("read the browser log")
            .json()
            .await
            .expect("the browser log is JSON");
        let entries = response["value"]
            .as_array()
            .unwrap_or_else(|| panic!("no browser log: {response}"))
            .clone();
        entries
            .into_iter()
            .filter(|entry| entry["level"] == "SEVERE")
            .collect()
    }

    /// Reads the browser log, stops, then fails the test if the browser logged any error.
    async fn stop_without_errors(self) {
        let errors = self.console_errors().await;
        self.stop().await;
        assert!(errors.is_empty(), "the browser logged errors: {errors:#?}");
    }

    /// Ends the session (the browser quits), then chromedriver.
    async fn stop(mut self) {
        let _ = self.client.clone().close().await;
        let _ = self.driver.kill().await;
    }
}

impl Drop for Browser {
    /// Whatever happened (a failed assertion included), nothing of the browser outlives the test:
    /// the process group that chromedriver leads, browser processes included, is killed.
    fn drop(&mut self) {
        let _ = std::process::Command::new("kill")
            .args(["-KILL", "--", &format!("-{}", self.group)])
            .stderr(std::process::Stdio::null())
            .status();
    }
}
