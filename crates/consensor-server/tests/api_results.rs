//! The consensus results, set-aside review and station health parts of the HTTP contract (API.md
//! "Consensus results", "Set-aside readings and review", "Station health"), end to end: readings
//! go in through `POST /v1/readings`, the server's own background worker computes the intervals,
//! and the answers are read back through a real HTTP client, on a real SQLite file and a real
//! PostgreSQL database.
//!
//! The readings are small invented fixtures. Every expected number was computed outside Consensor
//! with numpy 2.4.6, scipy 1.17.1 and statsmodels 0.15.0; the call is named beside each check.
//! Statuses, field names and the definitions the numbers follow are API.md's.

mod common;

use common::{at, wait_until_computed, TestServer, ADMIN, FAST_WORKER, T0_MS};
use consensor_store::testing::TestDatabase;
use reqwest::Method;
use serde_json::{json, Value};

on_both_backends!(
    series_latest_and_revisions,
    set_aside_listing_review_and_audit,
    roles_and_recompute,
    station_health_shows_a_planted_drift,
    a_late_reading_recomputes_the_next_interval_it_reaches,
);

const HOUR_MS: i64 = 3_600_000;

fn reading(station: &str, value: Value, minute: i64) -> Value {
    json!({"station": station, "quantity": "air_temperature", "value": value, "observed_at": at(minute)})
}

/// A reading at `T0 + hours h + minutes`.
fn reading_at_hour(station: &str, value: f64, hours: i64, minutes: i64) -> Value {
    json!({
        "station": station,
        "quantity": "air_temperature",
        "value": value,
        "observed_at": consensor_server::http::rfc3339(T0_MS + hours * HOUR_MS + minutes * 60_000),
    })
}

async fn get_ok(server: &TestServer, path: &str) -> Value {
    let (status, body) = server.get(path, Some(ADMIN)).await;
    assert_eq!(status, 200, "GET {path}: {body}");
    body
}

/// Checks a JSON number against an outside value, to 1e-9 relative (the outside libraries and the
/// core sum and divide in different orders, so the last bits may differ).
fn close(body: &Value, field: &str, expected: f64) {
    let got = body[field]
        .as_f64()
        .unwrap_or_else(|| panic!("{field} is not a number in {body}"));
    assert!(
        (got - expected).abs() <= 1e-9 * expected.abs().max(1.0),
        "{field}: got {got}, expected {expected} in {body}"
    );
}

/// The exact key set of an API.md `Point`.
const POINT_FIELDS: [&str; 17] = [
    "start",
    "end",
    "median",
    "median_low",
    "median_high",
    "mean",
    "mean_all",
    "mad",
    "spread",
    "ci95_low",
    "ci95_high",
    "huber",
    "stations_used",
    "stations_set_aside",
    "revision",
    "computed_at",
    "status",
];

fn assert_point_shape(point: &Value) {
    let mut keys: Vec<&str> = point
        .as_object()
        .unwrap_or_else(|| panic!("not an object: {point}"))
        .keys()
        .map(String::as_str)
        .collect();
    keys.sort_unstable();
    let mut expected = POINT_FIELDS.to_vec();
    expected.sort_unstable();
    assert_eq!(keys, expected, "{point}");
    // API.md: every timestamp is RFC 3339 in UTC on output.
    for field in ["start", "end", "computed_at"] {
        let text = point[field].as_str().unwrap();
        assert!(
            text.ends_with('Z') && chrono::DateTime::parse_from_rfc3339(text).is_ok(),
            "{field}: {text}"
        );
    }
}

/// The shared fixture: area `basin` (10-minute intervals), stations S1–S7, two intervals of air
/// temperature. S6 sends a missing-data code and a null in the first interval and a value far too
/// high in the second; S7 sends nothing until a test posts its late reading.
async fn basin(server: &TestServer) {
    server
        .network("basin", &["S1", "S2", "S3", "S4", "S5", "S6", "S7"])
        .await;
    server
        .post_readings(vec![
            // Interval [T0, T0 + 10 min).
            reading("S1", json!(12.0), 1),
            reading("S2", json!(12.3), 1),
            reading("S3", json!(12.5), 1),
            reading("S4", json!(12.6), 1),
            reading("S5", json!(14.0), 1),
            reading("S6", json!(-999), 1),
            reading("S6", Value::Null, 2),
            // Interval [T0 + 10 min, T0 + 20 min).
            reading("S1", json!(13.1), 11),
            reading("S2", json!(13.4), 11),
            reading("S3", json!(13.8), 11),
            reading("S4", json!(13.9), 11),
            reading("S5", json!(14.2), 11),
            reading("S6", json!(30.0), 11),
        ])
        .await;
    wait_until_computed(server).await;
}

async fn series_latest_and_revisions(database: TestDatabase) {
    let server = TestServer::start(database, &[FAST_WORKER]).await;
    basin(&server).await;

    let series = get_ok(
        &server,
        &format!(
            "/v1/areas/basin/series?quantity=air_temperature&from={}&to={}",
            at(0),
            at(20)
        ),
    )
    .await;
    assert_eq!(series["area"], "basin");
    assert_eq!(series["quantity"], "air_temperature");
    assert_eq!(series["unit"], "Cel");
    assert_eq!(series["interval"], "10m");
    let points = series["points"].as_array().unwrap();
    assert_eq!(points.len(), 2, "{series}");

    // Interval 1: S1–S5 give 12.0, 12.3, 12.5, 12.6, 14.0; S6 sent only -999 and null.
    let first = &points[0];
    assert_point_shape(first);
    assert_eq!(first["start"], at(0));
    assert_eq!(first["end"], at(10));
    assert_eq!(first["revision"], 1);
    assert_eq!(first["status"], "ok");
    assert_eq!(first["stations_used"], 5);
    assert_eq!(first["stations_set_aside"], 1);
    // numpy.median([12.0, 12.3, 12.5, 12.6, 14.0]) = 12.5; odd n, so low = high = median (API.md).
    close(first, "median", 12.5);
    close(first, "median_low", 12.5);
    close(first, "median_high", 12.5);
    // numpy.mean of the same = 12.68.
    close(first, "mean", 12.68);
    // API.md mean_all: the naive mean over stations with no check, S6's -999 included:
    // numpy.mean([12.0, 12.3, 12.5, 12.6, 14.0, -999.0]) = -155.93333333333334.
    close(first, "mean_all", -155.933_333_333_333_34);
    // scipy.stats.median_abs_deviation(x) = 0.2 and (x, scale='normal') = 0.29652044370111935.
    close(first, "mad", 0.2);
    close(first, "spread", 0.296_520_443_701_119_35);
    // API.md: no distribution-free interval for n <= 5.
    assert_eq!(first["ci95_low"], Value::Null);
    assert_eq!(first["ci95_high"], Value::Null);
    // statsmodels.robust.norms.estimate_location(x, 0.29652044370111935, norm=HuberT(t=1.345),
    // maxiter=1000, tol=1e-13) = 12.466666666666677.
    close(first, "huber", 12.466_666_666_666_677);

    // Interval 2: S6's 30.0 is set aside far from the consensus; the other five are used.
    let second = &points[1];
    assert_point_shape(second);
    assert_eq!(second["start"], at(10));
    assert_eq!(second["stations_used"], 5);
    assert_eq!(second["stations_set_aside"], 1);
    // numpy.median([13.1, 13.4, 13.8, 13.9, 14.2]) = 13.8; numpy.mean = 13.679999999999998;
    // the naive mean with 30.0: numpy.mean([13.1, 13.4, 13.8, 13.9, 14.2, 30.0]) = 16.4.
    close(second, "median", 13.8);
    close(second, "mean", 13.68);
    close(second, "mean_all", 16.4);
    // scipy.stats.median_abs_deviation(x) = 0.4, (x, scale='normal') = 0.5930408874022387; every
    // value lies within 1.345 spreads of the mean, so statsmodels' estimate_location (as above)
    // gives the mean, 13.679999999999998.
    close(second, "mad", 0.4);
    close(second, "spread", 0.593_040_887_402_238_7);
    close(second, "huber", 13.68);

    // `from` inclusive and `to` exclusive on the interval start (API.md).
    let later = get_ok(
        &server,
        &format!(
            "/v1/areas/basin/series?quantity=air_temperature&from={}&to={}",
            at(10),
            at(20)
        ),
    )
    .await;
    assert_eq!(later["points"].as_array().unwrap().len(), 1);
    assert_eq!(later["points"][0]["start"], at(10));
    let earlier = get_ok(
        &server,
        &format!(
            "/v1/areas/basin/series?quantity=air_temperature&from={}&to={}",
            at(0),
            at(10)
        ),
    )
    .await;
    assert_eq!(earlier["points"].as_array().unwrap().len(), 1);
    assert_eq!(earlier["points"][0]["start"], at(0));
    // Input accepts any RFC 3339 offset: 09:00+02:00 is 07:00Z (the `+` percent-encoded).
    let offset = get_ok(
        &server,
        "/v1/areas/basin/series?quantity=air_temperature&from=2026-06-01T09:00:00%2B02:00&to=2026-06-01T09:10:00%2B02:00",
    )
    .await;
    assert_eq!(offset["points"][0]["start"], at(0));

    let latest = get_ok(&server, "/v1/areas/basin/latest?quantity=air_temperature").await;
    assert_point_shape(&latest);
    assert_eq!(latest["start"], at(10));

    // A late reading for interval 1 makes revision 2; revision 1 stays readable.
    server
        .post_readings(vec![reading("S7", json!(12.7), 5)])
        .await;
    wait_until_computed(&server).await;
    let revised = get_ok(
        &server,
        &format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature",
            at(0)
        ),
    )
    .await;
    assert_point_shape(&revised);
    assert_eq!(revised["revision"], 2);
    assert_eq!(revised["stations_used"], 6);
    // x = [12.0, 12.3, 12.5, 12.6, 14.0, 12.7]: numpy.median = 12.55, the two middle values 12.5
    // and 12.6 are median_low and median_high (API.md, even n); numpy.mean = 12.683333333333332.
    close(&revised, "median", 12.55);
    close(&revised, "median_low", 12.5);
    close(&revised, "median_high", 12.6);
    close(&revised, "mean", 12.683_333_333_333_332);
    // numpy.mean(x + [-999.0]) = -131.84285714285713.
    close(&revised, "mean_all", -131.842_857_142_857_13);
    // scipy.stats.quantile_test(x, q=numpy.median(x)).confidence_interval(0.95) = (12.0, 14.0).
    close(&revised, "ci95_low", 12.0);
    close(&revised, "ci95_high", 14.0);
    // estimate_location(x, 0.29652044370111935, norm=HuberT(t=1.345), maxiter=1000, tol=1e-13)
    // = 12.525000000000004.
    close(&revised, "huber", 12.525);
    let original = get_ok(
        &server,
        &format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature&revision=1",
            at(0)
        ),
    )
    .await;
    assert_eq!(original["revision"], 1);
    close(&original, "median", 12.5);
    assert_eq!(original["stations_used"], 5);
    // The next interval is computed again, as the late reading lies within the history its
    // readings are judged on; S7 has no reading there, so its point is the same as before.
    let recomputed = get_ok(
        &server,
        &format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature",
            at(10)
        ),
    )
    .await;
    assert_eq!(recomputed["revision"], 2);
    close(&recomputed, "median", 13.8);
    assert_eq!(recomputed["stations_used"], 5);
    // A revision that does not exist, or an interval never computed, is 404.
    for path in [
        format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature&revision=3",
            at(0)
        ),
        format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature",
            at(30)
        ),
        // 07:05 lies inside an interval; the 404 says where that interval starts.
        format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature",
            at(5)
        ),
    ] {
        let (status, body) = server.get(&path, Some(ADMIN)).await;
        assert_eq!(status, 404, "{path}: {body}");
        assert_eq!(body["error"], "not_found");
    }
    let (_, body) = server
        .get(
            &format!(
                "/v1/areas/basin/intervals/{}?quantity=air_temperature",
                at(5)
            ),
            Some(ADMIN),
        )
        .await;
    assert!(body["message"].as_str().unwrap().contains(&at(0)), "{body}");

    // Bad requests name the parameter (API.md error body; 422 for well-formed but invalid input).
    let range = format!("from={}&to={}", at(0), at(20));
    for (path, field) in [
        (format!("/v1/areas/basin/series?{range}"), "quantity"),
        (
            format!("/v1/areas/basin/series?quantity=snow_depth&{range}"),
            "quantity",
        ),
        (
            format!(
                "/v1/areas/basin/series?quantity=air_temperature&from=yesterday&to={}",
                at(20)
            ),
            "from",
        ),
        (
            format!(
                "/v1/areas/basin/series?quantity=air_temperature&from={}",
                at(0)
            ),
            "to",
        ),
        (
            format!(
                "/v1/areas/basin/series?quantity=air_temperature&from={}&to={}",
                at(20),
                at(0)
            ),
            "to",
        ),
        (
            format!("/v1/areas/basin/series?quantity=air_temperature&{range}&colour=red"),
            "colour",
        ),
        // More than 10 000 ten-minute intervals in one request.
        (
            format!(
                "/v1/areas/basin/series?quantity=air_temperature&from={}&to={}",
                at(0),
                at(10 * 10_001)
            ),
            "to",
        ),
        (
            format!(
                "/v1/areas/basin/intervals/{}?quantity=air_temperature&revision=0",
                at(0)
            ),
            "revision",
        ),
        ("/v1/areas/basin/latest".to_owned(), "quantity"),
    ] {
        let (status, body) = server.get(&path, Some(ADMIN)).await;
        assert_eq!(status, 422, "{path}: {body}");
        assert_eq!(body["error"], "invalid_input", "{path}");
        assert_eq!(body["details"][0]["field"], field, "{path}: {body}");
    }
    // An unknown area is 404; so is an area with no result for the quantity yet.
    for path in [
        format!("/v1/areas/nowhere/series?quantity=air_temperature&{range}"),
        "/v1/areas/nowhere/latest?quantity=air_temperature".to_owned(),
        "/v1/areas/basin/latest?quantity=relative_humidity".to_owned(),
    ] {
        let (status, body) = server.get(&path, Some(ADMIN)).await;
        assert_eq!(status, 404, "{path}: {body}");
    }
    // An interval start that is not a time cannot name an interval: 400.
    let (status, _) = server
        .get(
            "/v1/areas/basin/intervals/not-a-time?quantity=air_temperature",
            Some(ADMIN),
        )
        .await;
    assert_eq!(status, 400);
    server.stop().await;
}

/// Lists `/v1/set-aside` with `query`, as admin.
async fn set_aside(server: &TestServer, query: &str) -> Value {
    get_ok(server, &format!("/v1/set-aside?{query}")).await
}

fn reading_ids(page: &Value) -> Vec<i64> {
    page["items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|item| item["reading_id"].as_i64().unwrap())
        .collect()
}

async fn set_aside_listing_review_and_audit(database: TestDatabase) {
    let server = TestServer::start(database, &[FAST_WORKER]).await;
    basin(&server).await;
    let (operator_id, operator) = server.token("operator", &[]).await;
    let (_, reader) = server.token("reader", &[]).await;

    let all = set_aside(&server, "").await;
    let items = all["items"].as_array().unwrap();
    assert_eq!(items.len(), 3, "{all}");
    assert_eq!(all["next_cursor"], Value::Null);
    // Ordered by observation time: the code at +1 min, the null at +2, the high value at +11.
    let rules: Vec<&str> = items.iter().map(|i| i["rule"].as_str().unwrap()).collect();
    assert_eq!(
        rules,
        ["missing_code", "missing_value", "far_from_consensus"]
    );
    for item in items {
        for field in [
            "reading_id",
            "station",
            "area",
            "quantity",
            "value",
            "unit",
            "value_as_sent",
            "unit_as_sent",
            "observed_at",
            "rule",
            "reason",
            "score",
            "threshold",
            "consensus_median",
            "consensus_spread",
            "review",
        ] {
            assert!(item.get(field).is_some(), "{field} missing in {item}");
        }
        assert_eq!(item["station"], "S6");
        assert_eq!(item["area"], "basin");
        assert_eq!(item["quantity"], "air_temperature");
        assert_eq!(item["unit"], "Cel");
        assert_eq!(item["unit_as_sent"], Value::Null);
        assert_eq!(
            item["review"],
            json!({"state": "pending", "by": null, "at": null, "note": null})
        );
    }
    // API.md: no score or threshold for the missing rules, and no consensus for the hard rules.
    let code = &items[0];
    assert_eq!(code["observed_at"], at(1));
    assert_eq!(code["value"], -999.0);
    assert_eq!(code["value_as_sent"], -999.0);
    for field in ["score", "threshold", "consensus_median", "consensus_spread"] {
        assert_eq!(code[field], Value::Null, "{field}");
        assert_eq!(items[1][field], Value::Null, "{field}");
    }
    assert_eq!(items[1]["value"], Value::Null);
    // The cross-station test on [13.1, 13.4, 13.8, 13.9, 14.2, 30.0]: numpy.median = 13.85,
    // scipy.stats.median_abs_deviation(x, scale='normal') = 0.59304088740224 (above the 0.5 floor,
    // so it is the scale), score (30.0 − 13.85) / 0.59304088740224 = 27.23252366 (API.md step 5),
    // limit 3.5.
    let far = &items[2];
    assert_eq!(far["observed_at"], at(11));
    close(far, "value", 30.0);
    close(far, "score", 27.232_523_66);
    close(far, "threshold", 3.5);
    close(far, "consensus_median", 13.85);
    close(far, "consensus_spread", 0.593_040_887_402_24);
    let reason = far["reason"].as_str().unwrap();
    for number in ["30.0", "13.85", "0.593", "27.233", "3.5"] {
        assert!(reason.contains(number), "{number} not in {reason:?}");
    }

    // Filters.
    let ids = reading_ids(&all);
    assert_eq!(reading_ids(&set_aside(&server, "station=S6").await), ids);
    assert_eq!(reading_ids(&set_aside(&server, "area=basin").await), ids);
    assert_eq!(
        reading_ids(&set_aside(&server, "quantity=air_temperature").await),
        ids
    );
    assert_eq!(
        reading_ids(&set_aside(&server, "review=pending").await),
        ids
    );
    assert!(reading_ids(&set_aside(&server, "station=S1").await).is_empty());
    assert!(reading_ids(&set_aside(&server, "quantity=dew_point").await).is_empty());
    assert!(reading_ids(&set_aside(&server, "review=upheld").await).is_empty());
    // `from` inclusive, `to` exclusive, on the observation time.
    assert_eq!(
        reading_ids(&set_aside(&server, &format!("from={}", at(2))).await),
        ids[1..]
    );
    assert_eq!(
        reading_ids(&set_aside(&server, &format!("to={}", at(2))).await),
        ids[..1]
    );
    // limit=1 walks every item once, in order, and the last page has no cursor.
    let mut walked = Vec::new();
    let mut cursor: Option<String> = None;
    for _ in 0..10 {
        let query = match &cursor {
            Some(cursor) => format!("limit=1&cursor={cursor}"),
            None => "limit=1".to_owned(),
        };
        let page = set_aside(&server, &query).await;
        walked.extend(reading_ids(&page));
        match page["next_cursor"].as_str() {
            Some(next) => cursor = Some(next.to_owned()),
            None => break,
        }
    }
    assert_eq!(walked, ids);

    // API.md: a limit that is not a whole number from 1 to 1000 is 422; so is any other bad filter.
    for (query, field) in [
        ("limit=0", "limit"),
        ("limit=1001", "limit"),
        ("limit=ten", "limit"),
        ("limit=2.5", "limit"),
        ("cursor=garbage", "cursor"),
        ("review=maybe", "review"),
        ("quantity=snow_depth", "quantity"),
        ("station=NOPE", "station"),
        ("area=nowhere", "area"),
        ("from=noon", "from"),
        ("sort=desc", "sort"),
    ] {
        let (status, body) = server
            .get(&format!("/v1/set-aside?{query}"), Some(ADMIN))
            .await;
        assert_eq!(status, 422, "{query}: {body}");
        assert_eq!(body["details"][0]["field"], field, "{query}: {body}");
    }
    let (status, body) = server.get("/v1/set-aside?limit=1000", Some(&reader)).await;
    assert_eq!(status, 200, "{body}");

    // Reviews: operator or admin only, a known decision, no unknown fields, a reading once set aside.
    let far_id = far["reading_id"].as_i64().unwrap();
    let code_id = code["reading_id"].as_i64().unwrap();
    let review_path = format!("/v1/set-aside/{far_id}/review");
    let overturn = json!({"decision": "overturn", "note": "mast checked, the sensor is fine"});
    let (status, _) = server
        .call(
            Method::POST,
            &review_path,
            Some(&reader),
            Some(overturn.clone()),
        )
        .await;
    assert_eq!(status, 403);
    let (status, _) = server
        .call(Method::POST, &review_path, None, Some(overturn.clone()))
        .await;
    assert_eq!(status, 401);
    // The role is judged before the body: a reader learns it may not review, not how to fix it.
    let (status, _) = server
        .call(
            Method::POST,
            &review_path,
            Some(&reader),
            Some(json!({"decision": "maybe"})),
        )
        .await;
    assert_eq!(status, 403);
    for (body, field) in [
        (json!({"decision": "maybe"}), Some("decision")),
        (json!({"decision": "overturn", "colour": "red"}), None),
        (json!({"note": "no decision"}), None),
    ] {
        let (status, answer) = server
            .call(Method::POST, &review_path, Some(&operator), Some(body))
            .await;
        assert_eq!(status, 422, "{answer}");
        if let Some(field) = field {
            assert_eq!(answer["details"][0]["field"], field);
        }
    }
    let (status, _) = server
        .call(
            Method::POST,
            "/v1/set-aside/999999/review",
            Some(&operator),
            Some(overturn.clone()),
        )
        .await;
    assert_eq!(status, 404);
    let (status, _) = server
        .call(
            Method::POST,
            "/v1/set-aside/abc/review",
            Some(&operator),
            Some(overturn.clone()),
        )
        .await;
    assert_eq!(status, 400);

    let (status, record) = server
        .call(Method::POST, &review_path, Some(&operator), Some(overturn))
        .await;
    assert_eq!(status, 200, "{record}");
    assert_eq!(record["reading_id"], far_id);
    assert_eq!(record["decision"], "overturn");
    assert_eq!(record["by"], operator_id.as_str());
    assert_eq!(record["station"], "S6");
    assert_eq!(record["observed_at"], at(11));
    assert_eq!(record["note"], "mast checked, the sensor is fine");
    let review_id = record["id"].as_i64().unwrap();

    // The decision is in the audit log at once, and the interval was recomputed before the
    // answer (API.md: "recomputed at once"): nothing is pending and the next read, made without
    // waiting for the worker, is the new revision.
    let log = get_ok(&server, "/v1/audit").await;
    assert_eq!(log["items"].as_array().unwrap().len(), 1);
    assert_eq!(log["items"][0], record);
    assert_eq!(get_ok(&server, "/v1/status").await["pending_intervals"], 0);
    let recomputed = get_ok(
        &server,
        &format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature",
            at(10)
        ),
    )
    .await;
    // The overturned reading is used again: x = [13.1, 13.4, 13.8, 13.9, 14.2, 30.0],
    // numpy.median = 13.85, numpy.mean = 16.4, and
    // statsmodels.robust.norms.estimate_location(x, 0.59304088740224, norm=HuberT(t=1.345),
    // maxiter=1000, tol=1e-13) = 13.839527998711201.
    assert_eq!(recomputed["revision"], 2);
    assert_eq!(recomputed["stations_used"], 6);
    close(&recomputed, "median", 13.85);
    close(&recomputed, "mean", 16.4);
    close(&recomputed, "huber", 13.839_527_998_711_201);
    let overturned = set_aside(&server, "review=overturned").await;
    assert_eq!(reading_ids(&overturned), [far_id]);
    let shown = &overturned["items"][0]["review"];
    assert_eq!(shown["state"], "overturned");
    assert_eq!(shown["by"], operator_id.as_str());
    assert_eq!(shown["note"], "mast checked, the sensor is fine");
    assert!(shown["at"].as_str().unwrap().ends_with('Z'));
    assert_eq!(
        reading_ids(&set_aside(&server, "review=pending").await),
        ids[..2]
    );

    // An admin upholds the missing code; the admin token from the environment has its own id.
    let (status, upheld) = server
        .call(
            Method::POST,
            &format!("/v1/set-aside/{code_id}/review"),
            Some(ADMIN),
            Some(json!({"decision": "uphold"})),
        )
        .await;
    assert_eq!(status, 200, "{upheld}");
    assert_eq!(upheld["by"], "admin-from-environment");
    assert_eq!(upheld["note"], Value::Null);
    wait_until_computed(&server).await;
    let listed = set_aside(&server, "review=upheld").await;
    assert_eq!(reading_ids(&listed), [code_id]);
    assert_eq!(listed["items"][0]["review"]["state"], "upheld");

    // The audit log, newest first, filtered and paged.
    let log = get_ok(&server, "/v1/audit").await;
    let decisions: Vec<&str> = log["items"]
        .as_array()
        .unwrap()
        .iter()
        .map(|i| i["decision"].as_str().unwrap())
        .collect();
    assert_eq!(decisions, ["uphold", "overturn"]);
    let (status, _) = server.get("/v1/audit", Some(&reader)).await;
    assert_eq!(status, 200);
    let first_page = get_ok(&server, "/v1/audit?limit=1").await;
    assert_eq!(first_page["items"][0]["reading_id"], code_id);
    let cursor = first_page["next_cursor"].as_str().unwrap().to_owned();
    let second_page = get_ok(&server, &format!("/v1/audit?limit=1&cursor={cursor}")).await;
    assert_eq!(second_page["items"][0]["id"], review_id);
    assert_eq!(second_page["next_cursor"], Value::Null);
    let by_reading = get_ok(&server, &format!("/v1/audit?reading_id={far_id}")).await;
    assert_eq!(by_reading["items"].as_array().unwrap().len(), 1);
    let by_station = get_ok(&server, "/v1/audit?station=S1").await;
    assert!(by_station["items"].as_array().unwrap().is_empty());
    for query in ["limit=0", "cursor=x", "reading_id=minus", "station=NOPE"] {
        let (status, body) = server.get(&format!("/v1/audit?{query}"), Some(ADMIN)).await;
        assert_eq!(status, 422, "{query}: {body}");
    }
    server.stop().await;
}

async fn roles_and_recompute(database: TestDatabase) {
    let server = TestServer::start(database, &[FAST_WORKER]).await;
    basin(&server).await;
    let (_, station) = server.token("station", &["S1"]).await;
    let (_, reader) = server.token("reader", &[]).await;
    let (_, operator) = server.token("operator", &[]).await;

    // API.md "Roles and tokens": read routes need at least `reader`; a station token may only post.
    let reads = [
        format!(
            "/v1/areas/basin/series?quantity=air_temperature&from={}&to={}",
            at(0),
            at(20)
        ),
        "/v1/areas/basin/latest?quantity=air_temperature".to_owned(),
        format!(
            "/v1/areas/basin/intervals/{}?quantity=air_temperature",
            at(0)
        ),
        "/v1/set-aside".to_owned(),
        "/v1/audit".to_owned(),
        "/v1/stations/S1/health?quantity=air_temperature".to_owned(),
    ];
    for path in &reads {
        assert_eq!(server.get(path, None).await.0, 401, "{path}");
        assert_eq!(server.get(path, Some("not-a-token")).await.0, 401, "{path}");
        assert_eq!(server.get(path, Some(&station)).await.0, 403, "{path}");
        assert_eq!(server.get(path, Some(&reader)).await.0, 200, "{path}");
        assert_eq!(server.get(path, Some(&operator)).await.0, 200, "{path}");
    }
    let (_, page) = server.get("/v1/set-aside", Some(&reader)).await;
    let reading_id = page["items"][0]["reading_id"].as_i64().unwrap();
    let review = format!("/v1/set-aside/{reading_id}/review");
    for token in [&station, &reader] {
        let (status, _) = server
            .call(
                Method::POST,
                &review,
                Some(token),
                Some(json!({"decision": "uphold"})),
            )
            .await;
        assert_eq!(status, 403);
    }

    // Recompute is admin only and answers 202 with the number of intervals queued: both intervals
    // of the range hold readings (API.md).
    let recompute = format!(
        "/v1/areas/basin/recompute?quantity=air_temperature&from={}&to={}",
        at(0),
        at(20)
    );
    assert_eq!(
        server.call(Method::POST, &recompute, None, None).await.0,
        401
    );
    for token in [&station, &reader, &operator] {
        let (status, _) = server
            .call(Method::POST, &recompute, Some(token), None)
            .await;
        assert_eq!(status, 403);
    }
    let (status, body) = server
        .call(Method::POST, &recompute, Some(ADMIN), None)
        .await;
    assert_eq!(status, 202, "{body}");
    assert_eq!(body, json!({"queued": 2}));
    wait_until_computed(&server).await;
    let series = get_ok(&server, &reads[0]).await;
    let revisions: Vec<i64> = series["points"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["revision"].as_i64().unwrap())
        .collect();
    assert_eq!(revisions, [2, 2]);
    // The same readings give the same consensus: numpy.median([12.0, 12.3, 12.5, 12.6, 14.0]).
    close(&series["points"][0], "median", 12.5);
    // Without `quantity`, every quantity of the range; `to` is exclusive on interval starts, so
    // [07:00, 07:10) holds one interval.
    let (status, body) = server
        .call(
            Method::POST,
            &format!("/v1/areas/basin/recompute?from={}&to={}", at(0), at(10)),
            Some(ADMIN),
            None,
        )
        .await;
    assert_eq!(status, 202, "{body}");
    assert_eq!(body, json!({"queued": 1}));
    wait_until_computed(&server).await;
    let first = get_ok(&server, &reads[2]).await;
    assert_eq!(first["revision"], 3);
    // An unknown area is 404; a missing or bad parameter 422.
    let (status, _) = server
        .call(
            Method::POST,
            &format!("/v1/areas/nowhere/recompute?from={}&to={}", at(0), at(10)),
            Some(ADMIN),
            None,
        )
        .await;
    assert_eq!(status, 404);
    for (query, field) in [
        (format!("to={}", at(10)), "from"),
        (
            format!("quantity=snow_depth&from={}&to={}", at(0), at(10)),
            "quantity",
        ),
    ] {
        let (status, body) = server
            .call(
                Method::POST,
                &format!("/v1/areas/basin/recompute?{query}"),
                Some(ADMIN),
                None,
            )
            .await;
        assert_eq!(status, 422, "{body}");
        assert_eq!(body["details"][0]["field"], field);
    }
    server.stop().await;
}

/// The drift fixture: every 6 hours for 5 days, three reference stations (R1–R3) and a station D1
/// that drifts upward by about 0.12 °C a day, all following one invented daily cycle with noise
/// of 0.15 °C. Columns: hours after T0, [R1, R2, R3], D1.
const DRIFT: [(i64, [f64; 3], f64); 21] = [
    (0, [15.00, 14.96, 14.82], 14.82),
    (6, [19.04, 18.81, 19.01], 18.94),
    (12, [14.96, 15.04, 15.20], 15.03),
    (18, [10.87, 11.02, 10.77], 11.22),
    (24, [14.93, 14.97, 15.13], 15.29),
    (30, [18.85, 18.62, 19.02], 18.95),
    (36, [15.01, 14.92, 14.90], 15.06),
    (42, [11.20, 10.99, 11.30], 11.31),
    (48, [14.93, 15.02, 15.11], 14.94),
    (54, [18.91, 18.77, 18.82], 19.20),
    (60, [15.07, 14.93, 15.01], 15.29),
    (66, [11.05, 10.85, 11.09], 11.52),
    (72, [15.02, 14.88, 14.97], 15.46),
    (78, [18.86, 19.16, 19.10], 19.34),
    (84, [15.00, 14.88, 14.99], 15.36),
    (90, [11.10, 11.00, 11.10], 11.41),
    (96, [14.80, 15.13, 15.22], 15.71),
    (102, [18.93, 18.91, 18.90], 19.45),
    (108, [14.71, 14.98, 15.03], 15.49),
    (114, [10.81, 11.02, 10.93], 11.62),
    (120, [14.72, 15.01, 15.02], 15.58),
];

async fn station_health_shows_a_planted_drift(database: TestDatabase) {
    let server = TestServer::start(database, &[FAST_WORKER]).await;
    server.network("valley", &["R1", "R2", "R3", "D1"]).await;
    // "Now" is one hour after the last reading: ingest refuses times more than 10 minutes ahead,
    // and the health window ends now.
    server.clock.set_ms(T0_MS + 121 * HOUR_MS);
    let mut readings = Vec::new();
    for (hours, references, drifting) in DRIFT {
        for (station, value) in ["R1", "R2", "R3"].into_iter().zip(references) {
            readings.push(reading_at_hour(station, value, hours, 3));
        }
        readings.push(reading_at_hour("D1", drifting, hours, 3));
    }
    // One missing-data code, alone in its interval: it counts as a reading set aside and gives no
    // station value (so no residual).
    readings.push(reading_at_hour("D1", -999.0, 99, 3));
    server.post_readings(readings).await;
    wait_until_computed(&server).await;

    // The residuals are D1 − numpy.median([R1, R2, R3, D1]) per interval (API.md "bias"; every
    // station is within 1.29 robust scores of the median, so D1 is used in each consensus), against
    // time in days (hours / 24).
    let health = get_ok(&server, "/v1/stations/D1/health?quantity=air_temperature").await;
    assert_eq!(health["station"], "D1");
    assert_eq!(health["quantity"], "air_temperature");
    assert_eq!(health["readings"], 22);
    assert_eq!(health["set_aside"], 1);
    close(&health, "set_aside_rate", 1.0 / 22.0);
    assert_eq!(health["intervals"], 21);
    // numpy.median(residuals) = 0.27500000000000036.
    close(&health, "bias", 0.275);
    // scipy.stats.theilslopes(residuals, hours / 24, alpha=0.95): slope 0.12414285714285742,
    // low_slope 0.08500000000000085, high_slope 0.1599999999999966.
    close(&health, "drift_per_day", 0.124_142_857_142_857_42);
    let ci = health["drift_per_day_ci95"].as_array().unwrap();
    assert_eq!(ci.len(), 2);
    assert!((ci[0].as_f64().unwrap() - 0.085).abs() < 1e-9, "{health}");
    assert!((ci[1].as_f64().unwrap() - 0.16).abs() < 1e-9, "{health}");
    // The LAD line area median = offset + gain · D1, solved exactly as a linear programme:
    // scipy.optimize.linprog (method='highs') on min Σ(u+v) s.t. offset + gain·d_i + u_i − v_i =
    // median_i: offset −0.45388398486759624, gain 1.0126103404791933 (statsmodels QuantReg(q=0.5)
    // agrees to 2e-5: −0.4538816, 1.0126102).
    let calibration = &health["calibration"];
    assert!(
        (calibration["gain"].as_f64().unwrap() - 1.012_610_340_479_193_3).abs() < 1e-7,
        "{health}"
    );
    assert!(
        (calibration["offset"].as_f64().unwrap() + 0.453_883_984_867_596_24).abs() < 1e-6,
        "{health}"
    );
    assert_eq!(
        health["last_seen"],
        consensor_server::http::rfc3339(T0_MS + 120 * HOUR_MS + 3 * 60_000)
    );

    // days=2: the window is [now − 48 h, now) = [T0 + 73 h, T0 + 121 h), so the intervals at hours
    // 78 … 120 (8 of them) and the -999 at hour 99.
    let recent = get_ok(
        &server,
        "/v1/stations/D1/health?quantity=air_temperature&days=2",
    )
    .await;
    assert_eq!(recent["readings"], 9);
    assert_eq!(recent["set_aside"], 1);
    assert_eq!(recent["intervals"], 8);
    // The same calls on those 8 residuals: numpy.median = 0.5074999999999994;
    // scipy.stats.theilslopes: slope 0.21199999999999902, CI [0.02999999999999936,
    // 0.3400000000000034]; linprog: offset −0.30897727272728903, gain 0.9886363636363646.
    close(&recent, "bias", 0.5075);
    close(&recent, "drift_per_day", 0.212);
    let ci = recent["drift_per_day_ci95"].as_array().unwrap();
    assert!((ci[0].as_f64().unwrap() - 0.03).abs() < 1e-9, "{recent}");
    assert!((ci[1].as_f64().unwrap() - 0.34).abs() < 1e-9, "{recent}");
    assert!(
        (recent["calibration"]["gain"].as_f64().unwrap() - 0.988_636_363_636_364_6).abs() < 1e-7,
        "{recent}"
    );
    assert!(
        (recent["calibration"]["offset"].as_f64().unwrap() + 0.308_977_272_727_289_03).abs() < 1e-6,
        "{recent}"
    );

    // A window with fewer than 3 intervals has a bias but no lines. With now at T0 + 133 h, a
    // one-day window is [T0 + 109 h, T0 + 133 h): it holds the intervals at hours 114 and 120 only.
    server.clock.set_ms(T0_MS + 133 * HOUR_MS);
    let sparse = get_ok(
        &server,
        "/v1/stations/D1/health?quantity=air_temperature&days=1",
    )
    .await;
    assert_eq!(sparse["intervals"], 2, "{sparse}");
    // Residuals at hours 114 and 120: 11.62 − median([10.81, 11.02, 10.93, 11.62]) = 0.645 and
    // 15.58 − median([14.72, 15.01, 15.02, 15.58]) = 0.565; numpy.median([0.645, 0.565]) = 0.605.
    close(&sparse, "bias", 0.605);
    assert_eq!(sparse["drift_per_day"], Value::Null);
    assert_eq!(sparse["drift_per_day_ci95"], json!([null, null]));
    assert_eq!(sparse["calibration"], json!({"gain": null, "offset": null}));

    // A station with no readings in the window: zero counts, no rate, every statistic null.
    let quiet = get_ok(&server, "/v1/stations/R1/health?quantity=dew_point").await;
    assert_eq!(quiet["readings"], 0);
    assert_eq!(quiet["set_aside_rate"], Value::Null);
    assert_eq!(quiet["bias"], Value::Null);

    // Errors: unknown station 404; `days` outside 1–366 or not whole, or no quantity, 422.
    let (status, _) = server
        .get(
            "/v1/stations/NOPE/health?quantity=air_temperature",
            Some(ADMIN),
        )
        .await;
    assert_eq!(status, 404);
    for (query, field) in [
        ("quantity=air_temperature&days=0", "days"),
        ("quantity=air_temperature&days=367", "days"),
        ("quantity=air_temperature&days=week", "days"),
        ("days=3", "quantity"),
        ("quantity=snow_depth", "quantity"),
    ] {
        let (status, body) = server
            .get(&format!("/v1/stations/D1/health?{query}"), Some(ADMIN))
            .await;
        assert_eq!(status, 422, "{query}: {body}");
        assert_eq!(body["details"][0]["field"], field, "{query}");
    }
    server.stop().await;
}

/// A late reading changes the verdict on a later interval that was already computed. Area `ridge`,
/// stations R1–R5. In [T0 + 10 min, T0 + 20 min) R5 jumps to 25.0 while R1–R4 read 13.0–13.6; R5
/// has no earlier reading, so there is no step test and its value is set aside by the
/// cross-station test. Then R5's reading of T0 + 9 min (12.9) comes late: the 25.0 is now a change
/// of 12.1 in one minute, over the 3.0 limit, so it is a step-suspect; the provisional consensus
/// does not clear it, and the second interval, computed again, sets it aside as `step` (API.md,
/// "How an interval is decided", rules 2, 3 and 5).
async fn a_late_reading_recomputes_the_next_interval_it_reaches(database: TestDatabase) {
    let server = TestServer::start(database, &[FAST_WORKER]).await;
    server
        .network("ridge", &["R1", "R2", "R3", "R4", "R5"])
        .await;
    let mut readings = Vec::new();
    for (station, first, second) in [
        ("R1", 12.8, 13.0),
        ("R2", 12.9, 13.2),
        ("R3", 13.1, 13.4),
        ("R4", 13.2, 13.6),
    ] {
        readings.push(reading(station, json!(first), 1));
        readings.push(reading(station, json!(second), 11));
    }
    readings.push(reading("R5", json!(25.0), 10));
    server.post_readings(readings).await;
    wait_until_computed(&server).await;

    let second_interval = format!("area=ridge&from={}&to={}", at(10), at(20));
    let before = set_aside(&server, &second_interval).await;
    let items = before["items"].as_array().unwrap();
    assert_eq!(items.len(), 1, "{before}");
    assert_eq!(items[0]["station"], "R5");
    assert_eq!(items[0]["rule"], "far_from_consensus");
    // Station values [13.0, 13.2, 13.4, 13.6, 25.0]: numpy.median = 13.4, scipy.stats
    // .median_abs_deviation = 0.2, so the scale is max(1.482602218505602 * 0.2, 0.5) = 0.5 (the
    // air-temperature floor of the quantity table) and the score (25.0 - 13.4) / 0.5 = 23.2.
    close(&items[0], "score", 23.2);

    server
        .post_readings(vec![reading("R5", json!(12.9), 9)])
        .await;
    wait_until_computed(&server).await;

    let after = set_aside(&server, &second_interval).await;
    let items = after["items"].as_array().unwrap();
    assert_eq!(items.len(), 1, "{after}");
    assert_eq!(items[0]["rule"], "step");
    // |25.0 - 12.9| = 12.1 over a one-minute gap, whose limit is the 1-minute figure, 3.0.
    close(&items[0], "score", 12.1);
    close(&items[0], "threshold", 3.0);
    let point = get_ok(
        &server,
        &format!(
            "/v1/areas/ridge/intervals/{}?quantity=air_temperature",
            at(10)
        ),
    )
    .await;
    assert_eq!(point["revision"], 2, "{point}");
    server.stop().await;
}
