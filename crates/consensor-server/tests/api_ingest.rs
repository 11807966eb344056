//! The ingest, network and token parts of the HTTP contract (API.md), through a real HTTP client
//! against the real server on a random port, on a real SQLite file and a real PostgreSQL database.
//! Expected statuses and bodies come from API.md; unit conversions from their exact definitions.

mod common;

use common::{at, TestServer, ADMIN};
use consensor_store::testing::{revisions_of, TestDatabase};
use consensor_store::Store;
use reqwest::Method;
use serde_json::{json, Value};

on_both_backends!(
    network_description_and_tokens,
    authentication_and_roles,
    json_ingest_counts_duplicates_and_revisions,
    bad_batches_store_nothing,
    units_are_converted_and_the_sent_value_kept,
    ndjson_and_senml_bodies,
    body_over_the_limit_is_413,
    health_readiness_and_status,
);

fn reading(station: &str, quantity: &str, value: Value, minute: i64) -> Value {
    json!({"station": station, "quantity": quantity, "value": value, "observed_at": at(minute)})
}

async fn post_json(server: &TestServer, token: &str, readings: Vec<Value>) -> (u16, Value) {
    server
        .call(
            Method::POST,
            "/v1/readings",
            Some(token),
            Some(json!({ "readings": readings })),
        )
        .await
}

async fn network_description_and_tokens(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    // API.md: PUT returns 201 when created, 200 when updated.
    let area = json!({"name": "North basin", "interval": "10m"});
    let (status, body) = server
        .call(
            Method::PUT,
            "/v1/areas/north-basin",
            Some(ADMIN),
            Some(area.clone()),
        )
        .await;
    assert_eq!(status, 201, "{body}");
    let (status, _) = server
        .call(
            Method::PUT,
            "/v1/areas/north-basin",
            Some(ADMIN),
            Some(area),
        )
        .await;
    assert_eq!(status, 200);
    // An interval that is not one of 1m, 5m, 10m, 15m, 30m, 1h is 422 naming the field.
    let (status, body) = server
        .call(
            Method::PUT,
            "/v1/areas/south",
            Some(ADMIN),
            Some(json!({"name": "South", "interval": "7m"})),
        )
        .await;
    assert_eq!(status, 422);
    assert_eq!(body["details"][0]["field"], "interval");
    // An id outside [A-Za-z0-9._-]{1,64} is 422.
    let (status, _) = server
        .call(
            Method::PUT,
            "/v1/areas/bad%20id",
            Some(ADMIN),
            Some(json!({"name": "x", "interval": "10m"})),
        )
        .await;
    assert_eq!(status, 422);
    let station = json!({"area": "north-basin", "name": "Mast 14", "lat": 10.5, "lon": -3.25, "elevation_m": 12.0});
    let (status, body) = server
        .call(
            Method::PUT,
            "/v1/stations/ST-014",
            Some(ADMIN),
            Some(station),
        )
        .await;
    assert_eq!(status, 201, "{body}");
    // A station in an unknown area is 422 naming `area`.
    let (status, body) = server
        .call(
            Method::PUT,
            "/v1/stations/ST-015",
            Some(ADMIN),
            Some(json!({"area": "nowhere", "name": "x"})),
        )
        .await;
    assert_eq!(status, 422);
    assert_eq!(body["details"][0]["field"], "area");
    // Unknown fields are an error (422), not silently ignored (API.md).
    let (status, _) = server
        .call(
            Method::PUT,
            "/v1/stations/ST-016",
            Some(ADMIN),
            Some(json!({"area": "north-basin", "name": "x", "colour": "red"})),
        )
        .await;
    assert_eq!(status, 422);
    let (status, body) = server
        .call(Method::GET, "/v1/areas", Some(ADMIN), None)
        .await;
    assert_eq!(status, 200);
    assert_eq!(
        body["areas"],
        json!([{"id": "north-basin", "name": "North basin", "interval": "10m"}])
    );
    let (_, body) = server
        .call(Method::GET, "/v1/stations", Some(ADMIN), None)
        .await;
    assert_eq!(body["stations"][0]["id"], "ST-014");
    assert_eq!(body["stations"][0]["elevation_m"], 12.0);
    let (_, body) = server
        .call(Method::GET, "/v1/quantities", Some(ADMIN), None)
        .await;
    let air = body["quantities"]
        .as_array()
        .unwrap()
        .iter()
        .find(|q| q["id"] == "air_temperature")
        .unwrap();
    // The API.md quantity table (WMO guideline figures, from memory there).
    assert_eq!(
        (
            air["unit"].clone(),
            air["range_min"].clone(),
            air["range_max"].clone()
        ),
        (json!("Cel"), json!(-80.0), json!(60.0))
    );

    // Tokens: created with 201 and shown once; a station token without stations is 422.
    let (status, body) = server
        .call(
            Method::POST,
            "/v1/tokens",
            Some(ADMIN),
            Some(json!({"role": "station", "stations": ["ST-014"], "label": "mast 14"})),
        )
        .await;
    assert_eq!(status, 201, "{body}");
    assert_eq!(body["role"], "station");
    assert_eq!(body["stations"], json!(["ST-014"]));
    assert!(body["token"].as_str().unwrap().len() >= 32);
    let (status, _) = server
        .call(
            Method::POST,
            "/v1/tokens",
            Some(ADMIN),
            Some(json!({"role": "station"})),
        )
        .await;
    assert_eq!(status, 422);
    let (status, _) = server
        .call(
            Method::POST,
            "/v1/tokens",
            Some(ADMIN),
            Some(json!({"role": "superuser"})),
        )
        .await;
    assert_eq!(status, 422);
    server.stop().await;
}

async fn authentication_and_roles(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    server.network("north-basin", &["ST-014", "ST-015"]).await;
    let one = vec![reading("ST-014", "air_temperature", json!(13.9), 0)];
    // No token or an unknown one: 401 (API.md "Roles and tokens").
    let (status, body) = server
        .call(
            Method::POST,
            "/v1/readings",
            None,
            Some(json!({"readings": one})),
        )
        .await;
    assert_eq!(status, 401);
    assert_eq!(body["error"], "unauthenticated");
    let (status, _) = post_json(&server, "cns_not-a-real-token", one.clone()).await;
    assert_eq!(status, 401);
    let (status, _) = server.call(Method::GET, "/v1/areas", None, None).await;
    assert_eq!(status, 401);
    // A reader may read but not post: 403. An operator may not create areas: 403.
    let (_, reader) = server.token("reader", &[]).await;
    let (status, _) = server
        .call(Method::GET, "/v1/areas", Some(&reader), None)
        .await;
    assert_eq!(status, 200);
    let (status, _) = post_json(&server, &reader, one.clone()).await;
    assert_eq!(status, 403);
    let (_, operator) = server.token("operator", &[]).await;
    let (status, _) = server
        .call(
            Method::PUT,
            "/v1/areas/x",
            Some(&operator),
            Some(json!({"name": "x", "interval": "1h"})),
        )
        .await;
    assert_eq!(status, 403);
    // A station token posts for its own station, not for another (403), and may not read (403).
    let (station_id, station) = server.token("station", &["ST-014"]).await;
    let (status, body) = post_json(&server, &station, one.clone()).await;
    assert_eq!(status, 200, "{body}");
    let foreign = vec![
        reading("ST-014", "air_temperature", json!(14.0), 1),
        reading("ST-015", "air_temperature", json!(14.0), 1),
    ];
    let (status, _) = post_json(&server, &station, foreign).await;
    assert_eq!(status, 403);
    assert_eq!(
        server.stored_readings().await,
        1,
        "the refused batch stored nothing"
    );
    let (status, _) = server
        .call(Method::GET, "/v1/areas", Some(&station), None)
        .await;
    assert_eq!(status, 403);
    // Revoked: 204, and the token stops working at once (401).
    let (status, _) = server
        .call(
            Method::DELETE,
            &format!("/v1/tokens/{station_id}"),
            Some(ADMIN),
            None,
        )
        .await;
    assert_eq!(status, 204);
    let (status, _) = post_json(&server, &station, one).await;
    assert_eq!(status, 401);
    let (status, _) = server
        .call(Method::DELETE, "/v1/tokens/tok_unknown", Some(ADMIN), None)
        .await;
    assert_eq!(status, 404);
    server.stop().await;
}

async fn json_ingest_counts_duplicates_and_revisions(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    server.network("north-basin", &["ST-014", "ST-015"]).await;
    let batch: Vec<Value> = (0..5)
        .flat_map(|minute| {
            [
                reading(
                    "ST-014",
                    "air_temperature",
                    json!(13.9 + minute as f64 / 10.0),
                    minute,
                ),
                reading("ST-015", "relative_humidity", json!(71.0), minute),
            ]
        })
        .collect();
    // API.md: 200 {"accepted", "duplicates", "revised"}; accepted counts newly stored readings.
    let (status, body) = post_json(&server, ADMIN, batch.clone()).await;
    assert_eq!(
        (status, body.clone()),
        (200, json!({"accepted": 10, "duplicates": 0, "revised": 0})),
        "{body}"
    );
    // The same batch again: all duplicates, stored once.
    let (status, body) = post_json(&server, ADMIN, batch).await;
    assert_eq!(
        (status, body),
        (200, json!({"accepted": 0, "duplicates": 10, "revised": 0}))
    );
    // A different value for an existing key is a revision; null is a value ("no value") too.
    let changed = vec![
        reading("ST-014", "air_temperature", json!(15.0), 0),
        reading("ST-015", "relative_humidity", Value::Null, 1),
        reading("ST-015", "relative_humidity", json!(71.0), 9),
    ];
    let (status, body) = post_json(&server, ADMIN, changed).await;
    assert_eq!(
        (status, body),
        (200, json!({"accepted": 3, "duplicates": 0, "revised": 2}))
    );
    assert_eq!(server.stored_readings().await, 13);
    // The history keeps both values.
    let store = server.database.open().await;
    let revisions = revisions_of(&store, "ST-014", "air_temperature", common::T0_MS).await;
    let values: Vec<Option<f64>> = revisions.iter().map(|r| r.value).collect();
    assert_eq!(values, vec![Some(13.9), Some(15.0)]);
    store.close().await;
    server.stop().await;
}

/// A bad body: (body, content type, expected status, an expected (index, field) in `details`).
type Case = (String, &'static str, u16, Option<(u64, &'static str)>);

async fn bad_batches_store_nothing(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    server.network("north-basin", &["ST-014"]).await;
    let good = reading("ST-014", "air_temperature", json!(13.9), 0);
    let (status, _) = post_json(&server, ADMIN, vec![good.clone()]).await;
    assert_eq!(status, 200);
    // Each case: (body, content type, expected status, expected (index, field) in details).
    let cases: Vec<Case> = vec![
        // Malformed JSON: 400.
        ("{\"readings\": [".into(), "application/json", 400, None),
        // A wrong content type: 415.
        (json!({"readings": [good.clone()]}).to_string(), "text/plain", 415, None),
        // A value that is a string: 422 naming index 1 and `value`.
        (json!({"readings": [good.clone(), reading("ST-014", "air_temperature", json!("13.9"), 1)]}).to_string(), "application/json", 422, Some((1, "value"))),
        // Out of range for a 64-bit float (API.md: 422).
        ("{\"readings\": [{\"station\": \"ST-014\", \"quantity\": \"air_temperature\", \"value\": 1e999, \"observed_at\": \"2026-06-01T07:05:00Z\"}]}".into(), "application/json", 422, None),
        // Unknown station and unknown quantity.
        (json!({"readings": [reading("ST-999", "air_temperature", json!(1.0), 2)]}).to_string(), "application/json", 422, Some((0, "station"))),
        (json!({"readings": [good.clone(), reading("ST-014", "snow_depth", json!(1.0), 2)]}).to_string(), "application/json", 422, Some((1, "quantity"))),
        // An unknown field.
        (json!({"readings": [{"station": "ST-014", "quantity": "air_temperature", "value": 1.0, "observed_at": at(3), "colour": "red"}]}).to_string(), "application/json", 422, Some((0, "colour"))),
        // Not RFC 3339, and more than 10 minutes in the future (the clock is at T0 + 60 min).
        (json!({"readings": [{"station": "ST-014", "quantity": "air_temperature", "value": 1.0, "observed_at": "01/06/2026 07:00"}]}).to_string(), "application/json", 422, Some((0, "observed_at"))),
        (json!({"readings": [reading("ST-014", "air_temperature", json!(1.0), 71)]}).to_string(), "application/json", 422, Some((0, "observed_at"))),
        // An unconvertible unit.
        (json!({"readings": [{"station": "ST-014", "quantity": "air_temperature", "value": 1.0, "unit": "hPa", "observed_at": at(4)}]}).to_string(), "application/json", 422, Some((0, "unit"))),
        // An empty batch, and a body of the wrong shape.
        (json!({"readings": []}).to_string(), "application/json", 422, None),
        (json!([1, 2, 3]).to_string(), "application/json", 422, None),
    ];
    for (body, content_type, expected, detail) in cases {
        let (status, answer) = server
            .post_raw("/v1/readings", Some(ADMIN), content_type, body.clone())
            .await;
        assert_eq!(status, expected, "{body} → {answer}");
        assert!(
            answer["error"].is_string() && answer["message"].is_string(),
            "{answer}"
        );
        if let Some((index, field)) = detail {
            let details = answer["details"].as_array().expect("details");
            assert!(
                details
                    .iter()
                    .any(|d| d["index"] == index && d["field"] == field),
                "{body} → {answer}"
            );
        }
    }
    // A batch with several bad readings lists every one.
    let (status, answer) = post_json(
        &server,
        ADMIN,
        vec![
            reading("ST-999", "air_temperature", json!(1.0), 5),
            good.clone(),
            reading("ST-014", "air_temperature", json!(true), 6),
        ],
    )
    .await;
    assert_eq!(status, 422);
    let indexes: Vec<u64> = answer["details"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| d["index"].as_u64().unwrap())
        .collect();
    assert!(indexes.contains(&0) && indexes.contains(&2), "{answer}");
    // Implausible values are NOT input errors: stored, to be set aside by the checks.
    let (status, body) = post_json(
        &server,
        ADMIN,
        vec![
            reading("ST-014", "air_temperature", json!(-999.0), 7),
            reading("ST-014", "air_temperature", json!(80.0), 8),
        ],
    )
    .await;
    assert_eq!((status, body["accepted"].clone()), (200, json!(2)));
    assert_eq!(
        server.stored_readings().await,
        3,
        "only the good batches were stored"
    );
    server.stop().await;
}

async fn units_are_converted_and_the_sent_value_kept(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    server.network("north-basin", &["ST-014"]).await;
    let readings = vec![
        // [degF] = 5/9 K with 32 °F = 0 °C: 212 °F = 100 °C (exact definition).
        json!({"station": "ST-014", "quantity": "air_temperature", "value": 212.0, "unit": "[degF]", "observed_at": at(0)}),
        // 1 [mi_i]/h = 1609.344 m / 3600 s = 0.44704 m/s (international mile, exact).
        json!({"station": "ST-014", "quantity": "wind_speed", "value": 10.0, "unit": "[mi_i]/h", "observed_at": at(0)}),
        // 1 kPa = 10 hPa (SI prefixes).
        json!({"station": "ST-014", "quantity": "air_pressure", "value": 101.325, "unit": "kPa", "observed_at": at(0)}),
        // No unit: the canonical unit is assumed.
        json!({"station": "ST-014", "quantity": "relative_humidity", "value": 55.0, "observed_at": at(0)}),
    ];
    let (status, body) = post_json(&server, ADMIN, readings).await;
    assert_eq!(status, 200, "{body}");
    let store = server.database.open().await;
    let check = |quantity: &'static str, value: f64, sent: f64, unit: Option<&'static str>| {
        let store = store.clone();
        async move {
            let history = store
                .readings_history("ST-014", quantity, common::T0_MS, common::T0_MS + 1)
                .await
                .unwrap();
            assert_eq!(history.len(), 1, "{quantity}");
            let stored = &history[0];
            assert!(
                (stored.value.unwrap() - value).abs() < 1e-9,
                "{quantity}: {:?}",
                stored.value
            );
            assert_eq!(stored.value_as_sent, Some(sent));
            assert_eq!(stored.unit_as_sent.as_deref(), unit);
        }
    };
    check("air_temperature", 100.0, 212.0, Some("[degF]")).await;
    check("wind_speed", 4.4704, 10.0, Some("[mi_i]/h")).await;
    check("air_pressure", 1013.25, 101.325, Some("kPa")).await;
    check("relative_humidity", 55.0, 55.0, None).await;
    store.close().await;
    server.stop().await;
}

async fn ndjson_and_senml_bodies(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    server.network("north-basin", &["ST-014"]).await;
    let ndjson = format!(
        "{}\n{}\n\n",
        reading("ST-014", "air_temperature", json!(13.9), 0),
        reading("ST-014", "air_temperature", json!(14.1), 1)
    );
    let (status, body) = server
        .post_raw("/v1/readings", Some(ADMIN), "application/x-ndjson", ndjson)
        .await;
    assert_eq!(
        (status, body),
        (200, json!({"accepted": 2, "duplicates": 0, "revised": 0}))
    );
    // A bad NDJSON line is 400.
    let (status, _) = server
        .post_raw(
            "/v1/readings",
            Some(ADMIN),
            "application/x-ndjson",
            "{\"station\": \n",
        )
        .await;
    assert_eq!(status, 400);
    // SenML (RFC 8428 §5.1.2-style pack: base name, base time, records with names and offsets).
    let t0_seconds = common::T0_MS / 1000;
    let senml = json!([
        {"bn": "urn:dev:mac:0024befffe804ff1:ST-014:", "bt": t0_seconds, "bu": "Cel", "n": "air_temperature", "v": 13.5, "t": 120},
        {"n": "air_temperature", "v": 13.6, "t": 180},
        {"n": "relative_humidity", "u": "%", "v": 70.5, "t": 180}
    ]);
    let (status, body) = server
        .post_raw(
            "/v1/readings",
            Some(ADMIN),
            "application/senml+json",
            senml.to_string(),
        )
        .await;
    assert_eq!(
        (status, body.clone()),
        (200, json!({"accepted": 3, "duplicates": 0, "revised": 0})),
        "{body}"
    );
    assert_eq!(server.stored_readings().await, 5);
    server.stop().await;
}

async fn body_over_the_limit_is_413(database: TestDatabase) {
    let server = TestServer::start(database, &[("CONSENSOR_BODY_LIMIT_BYTES", "2048")]).await;
    server.network("north-basin", &["ST-014"]).await;
    let readings: Vec<Value> = (0..60)
        .map(|m| reading("ST-014", "air_temperature", json!(10.0), m - 50))
        .collect();
    let (status, body) = post_json(&server, ADMIN, readings).await;
    assert_eq!(status, 413, "{body}");
    assert_eq!(body["error"], "payload_too_large");
    assert_eq!(server.stored_readings().await, 0);
    server.stop().await;
}

async fn health_readiness_and_status(database: TestDatabase) {
    let server = TestServer::start(database, &[]).await;
    let (status, body) = server.call(Method::GET, "/healthz", None, None).await;
    assert_eq!((status, body), (200, json!({"status": "ok"})));
    let (status, _) = server.call(Method::GET, "/readyz", None, None).await;
    assert_eq!(status, 200);
    server.network("north-basin", &["ST-014"]).await;
    let (status, _) = post_json(
        &server,
        ADMIN,
        vec![reading("ST-014", "air_temperature", json!(13.9), 0)],
    )
    .await;
    assert_eq!(status, 200);
    // The stored reading's interval is pending until the worker, running beside the server, has
    // computed it; then `last_computed_at` is set.
    let body = common::wait_until_computed(&server).await;
    assert_eq!(body["readings"], 1);
    assert!(body["last_computed_at"].is_string(), "{body}");
    let (status, body) = server
        .call(Method::GET, "/v1/nowhere", Some(ADMIN), None)
        .await;
    assert_eq!((status, body["error"].clone()), (404, json!("not_found")));
    server.stop().await;
}
