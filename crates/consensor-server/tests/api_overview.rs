//! The two read routes the web page needs beyond API.md's: `GET /v1/overview` (every area with the
//! newest result of each quantity it has) and `GET /v1/stations/{station}/values` (a station's
//! interval values beside its area's median), end to end through the real ingest API and worker,
//! on a real SQLite file and a real PostgreSQL database.
//!
//! The data are the worked example of Leys et al. (2013), J. Exp. Soc. Psychol. 49(4), 764–766:
//! 1, 3, 3, 6, 8, 10, 10, 1000 as eight stations' PM2.5 in two intervals. Only 1000 is set aside
//! (modified z-score 191.36 > 3.5) and the median of the seven kept is 6 (numpy 2.4 `np.median`;
//! the figures of consensor-core's `tests/interval.rs`).

mod common;

use common::{at, readings_at, wait_until_computed, TestServer, ADMIN, FAST_WORKER, LEYS, T0_MS};
use consensor_store::testing::TestDatabase;
use serde_json::{json, Value};

on_both_backends!(overview_lists_every_area, station_values_beside_the_median);

/// Two areas, one with the Leys et al. stations and readings at T0+5 and T0+15 minutes, one
/// with a station and no readings.
async fn load(server: &TestServer) -> Vec<String> {
    let stations: Vec<String> = (1..=8).map(|i| format!("VB-{i:02}")).collect();
    let ids: Vec<&str> = stations.iter().map(String::as_str).collect();
    server.network("velloran-basin", &ids).await;
    server.network("tarnwhistle-heights", &["TH-01"]).await;
    let readings = [5, 15]
        .into_iter()
        .flat_map(|minute| readings_at("pm2_5", &stations, &LEYS, minute))
        .collect();
    server.post_readings(readings).await;
    wait_until_computed(server).await;
    stations
}

async fn overview_lists_every_area(database: TestDatabase) {
    let server = TestServer::start(database, &[FAST_WORKER]).await;
    load(&server).await;
    let (status, body) = server.get("/v1/overview", Some(ADMIN)).await;
    assert_eq!(status, 200, "{body}");
    // The server's clock: TestServer starts it at T0 + 1 h.
    assert_eq!(
        body["now"],
        consensor_server::http::rfc3339(T0_MS + 3_600_000)
    );
    let areas = body["areas"].as_array().unwrap();
    let ids: Vec<&str> = areas.iter().map(|a| a["id"].as_str().unwrap()).collect();
    assert_eq!(ids, ["tarnwhistle-heights", "velloran-basin"]);

    let empty = &areas[0];
    assert_eq!(empty["stations"], 1);
    assert_eq!(empty["last_reading_at"], Value::Null);
    assert_eq!(empty["quantities"], json!([]));
    assert_eq!(empty["interval"], "10m");

    let basin = &areas[1];
    assert_eq!(basin["name"], "Area velloran-basin");
    assert_eq!(basin["stations"], 8);
    assert_eq!(basin["last_reading_at"], at(15));
    let quantities = basin["quantities"].as_array().unwrap();
    assert_eq!(quantities.len(), 1, "{basin}");
    assert_eq!(quantities[0]["quantity"], "pm2_5");
    assert_eq!(quantities[0]["unit"], "ug/m3");
    // The newest interval, T0+10 min: median 6 of the seven kept, 1000 set aside.
    let latest = &quantities[0]["latest"];
    assert_eq!(latest["start"], at(10));
    assert_eq!(latest["median"], 6.0);
    assert_eq!(latest["stations_used"], 7);
    assert_eq!(latest["stations_set_aside"], 1);
    assert_eq!(latest["status"], "ok");

    // A read route: a token is needed unless `public_read` is set.
    let (status, body) = server.get("/v1/overview", None).await;
    assert_eq!(status, 401, "{body}");
    assert_eq!(body["error"], "unauthenticated");
    server.stop().await;
}

async fn station_values_beside_the_median(database: TestDatabase) {
    let server = TestServer::start(database, &[FAST_WORKER]).await;
    load(&server).await;
    let from = at(0);
    let to = at(60);
    let (status, body) = server
        .get(
            &format!("/v1/stations/VB-08/values?quantity=pm2_5&from={from}&to={to}"),
            Some(ADMIN),
        )
        .await;
    assert_eq!(status, 200, "{body}");
    assert_eq!(body["station"], "VB-08");
    assert_eq!(body["area"], "velloran-basin");
    assert_eq!(body["unit"], "ug/m3");
    assert_eq!(body["interval"], "10m");
    // 1000 beside the median 6 of the others in both intervals, set aside (not used).
    assert_eq!(
        body["points"],
        json!([
            {"start": at(0), "station_value": 1000.0, "area_median": 6.0, "used": false},
            {"start": at(10), "station_value": 1000.0, "area_median": 6.0, "used": false},
        ])
    );
    // A kept station: value 3 beside 6, used.
    let (status, body) = server
        .get(
            &format!(
                "/v1/stations/VB-02/values?quantity=pm2_5&from={from}&to={}",
                at(10)
            ),
            Some(ADMIN),
        )
        .await;
    assert_eq!(status, 200, "{body}");
    assert_eq!(
        body["points"],
        json!([{"start": at(0), "station_value": 3.0, "area_median": 6.0, "used": true}])
    );

    // Errors name the parameter at fault.
    let (status, body) = server
        .get(
            &format!("/v1/stations/NO-SUCH/values?quantity=pm2_5&from={from}&to={to}"),
            Some(ADMIN),
        )
        .await;
    assert_eq!(status, 404, "{body}");
    let (status, body) = server
        .get(
            &format!("/v1/stations/VB-08/values?from={from}&to={to}"),
            Some(ADMIN),
        )
        .await;
    assert_eq!(status, 422, "{body}");
    assert_eq!(body["details"][0]["field"], "quantity", "{body}");
    // 10001 ten-minute intervals: one more than a request may return.
    let too_far = consensor_server::http::rfc3339(T0_MS + 10_001 * 600_000);
    let (status, body) = server
        .get(
            &format!("/v1/stations/VB-08/values?quantity=pm2_5&from={from}&to={too_far}"),
            Some(ADMIN),
        )
        .await;
    assert_eq!(status, 422, "{body}");
    assert_eq!(body["details"][0]["field"], "to", "{body}");
    server.stop().await;
}
