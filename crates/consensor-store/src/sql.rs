//! Queries whose SQL text is the same on both backends. SQLite accepts PostgreSQL's `$1` placeholders
//! through sqlx, so only the types differ; a macro stamps the functions out once per backend, which
//! keeps them concrete (and the compiler's messages readable) without generic executor bounds.

/// Defines the shared query functions inside the invoking module for one sqlx database type.
macro_rules! shared_queries {
    ($database:ty, $connection:ty) => {
        pub(crate) mod shared {
            use sqlx::{Pool, QueryBuilder, Row};

            use crate::{
                Area, NewArea, NewStation, NewToken, ReadingKey, Station, StoreError,
                StoredReading, Upserted,
            };

            /// Reachable, and every embedded migration applied successfully.
            pub(crate) async fn ping(
                pool: &Pool<$database>,
                migrator: &sqlx::migrate::Migrator,
            ) -> Result<(), StoreError> {
                sqlx::query("SELECT 1").execute(pool).await?;
                let applied: Vec<(i64, bool)> =
                    sqlx::query_as("SELECT version, success FROM _sqlx_migrations")
                        .fetch_all(pool)
                        .await?;
                for migration in migrator.iter() {
                    if migration.migration_type.is_down_migration() {
                        continue;
                    }
                    match applied
                        .iter()
                        .find(|(version, _)| *version == migration.version)
                    {
                        Some((_, true)) => {}
                        Some((_, false)) => {
                            return Err(StoreError::Other(format!(
                                "migration {} failed halfway and needs an operator",
                                migration.version
                            )));
                        }
                        None => {
                            return Err(StoreError::Other(format!(
                                "migration {} is not applied",
                                migration.version
                            )));
                        }
                    }
                }
                Ok(())
            }

            /// Inserts the area, or updates it when its key exists. `ON CONFLICT DO NOTHING`
            /// returns no row for an existing key, which tells creation from update without a
            /// race: a concurrent creator makes this insert wait and then do nothing.
            pub(crate) async fn upsert_area(
                connection: &mut $connection,
                area: &NewArea,
            ) -> Result<Upserted, StoreError> {
                let inserted: Option<(i64,)> = sqlx::query_as(
                    "INSERT INTO areas (key, name, interval_ms) VALUES ($1, $2, $3) \
                     ON CONFLICT (key) DO NOTHING RETURNING id",
                )
                .bind(&area.key)
                .bind(&area.name)
                .bind(area.interval_ms)
                .fetch_optional(&mut *connection)
                .await?;
                if let Some((id,)) = inserted {
                    return Ok(Upserted { id, created: true });
                }
                let (id,): (i64,) = sqlx::query_as(
                    "UPDATE areas SET name = $2, interval_ms = $3 WHERE key = $1 RETURNING id",
                )
                .bind(&area.key)
                .bind(&area.name)
                .bind(area.interval_ms)
                .fetch_one(&mut *connection)
                .await?;
                Ok(Upserted { id, created: false })
            }

            pub(crate) async fn list_areas(
                pool: &Pool<$database>,
            ) -> Result<Vec<Area>, StoreError> {
                let rows: Vec<(i64, String, String, i64)> =
                    sqlx::query_as("SELECT id, key, name, interval_ms FROM areas ORDER BY key")
                        .fetch_all(pool)
                        .await?;
                Ok(rows
                    .into_iter()
                    .map(|(id, key, name, interval_ms)| Area {
                        id,
                        key,
                        name,
                        interval_ms,
                    })
                    .collect())
            }

            /// Inserts or updates a station (see [`upsert_area`] for how creation is told apart).
            /// The area must exist.
            pub(crate) async fn upsert_station(
                connection: &mut $connection,
                station: &NewStation,
            ) -> Result<Upserted, StoreError> {
                let area: Option<(i64,)> = sqlx::query_as("SELECT id FROM areas WHERE key = $1")
                    .bind(&station.area_key)
                    .fetch_optional(&mut *connection)
                    .await?;
                let Some((area_id,)) = area else {
                    return Err(StoreError::NotFound(format!(
                        "unknown area {}",
                        station.area_key
                    )));
                };
                let inserted: Option<(i64,)> = sqlx::query_as(
                    "INSERT INTO stations (key, area_id, name, lat, lon, elevation_m) \
                     VALUES ($1, $2, $3, $4, $5, $6) ON CONFLICT (key) DO NOTHING RETURNING id",
                )
                .bind(&station.key)
                .bind(area_id)
                .bind(&station.name)
                .bind(station.lat)
                .bind(station.lon)
                .bind(station.elevation_m)
                .fetch_optional(&mut *connection)
                .await?;
                if let Some((id,)) = inserted {
                    return Ok(Upserted { id, created: true });
                }
                let (id,): (i64,) = sqlx::query_as(
                    "UPDATE stations SET area_id = $2, name = $3, lat = $4, lon = $5, \
                     elevation_m = $6 WHERE key = $1 RETURNING id",
                )
                .bind(&station.key)
                .bind(area_id)
                .bind(&station.name)
                .bind(station.lat)
                .bind(station.lon)
                .bind(station.elevation_m)
                .fetch_one(&mut *connection)
                .await?;
                Ok(Upserted { id, created: false })
            }

            pub(crate) async fn list_stations(
                pool: &Pool<$database>,
            ) -> Result<Vec<Station>, StoreError> {
                let rows = sqlx::query(
                    "SELECT s.id, s.key, s.area_id, a.key, s.name, s.lat, s.lon, s.elevation_m \
                     FROM stations s JOIN areas a ON a.id = s.area_id ORDER BY s.key",
                )
                .fetch_all(pool)
                .await?;
                let mut stations = Vec::with_capacity(rows.len());
                for row in rows {
                    stations.push(Station {
                        id: row.try_get(0)?,
                        key: row.try_get(1)?,
                        area_id: row.try_get(2)?,
                        area_key: row.try_get(3)?,
                        name: row.try_get(4)?,
                        lat: row.try_get(5)?,
                        lon: row.try_get(6)?,
                        elevation_m: row.try_get(7)?,
                    });
                }
                Ok(stations)
            }

            pub(crate) async fn insert_token(
                connection: &mut $connection,
                token: &NewToken,
            ) -> Result<(), StoreError> {
                sqlx::query(
                    "INSERT INTO tokens (id, hash, role, label, created_at_ms) \
                     VALUES ($1, $2, $3, $4, $5)",
                )
                .bind(&token.id)
                .bind(&token.hash)
                .bind(&token.role)
                .bind(&token.label)
                .bind(token.created_at_ms)
                .execute(&mut *connection)
                .await?;
                let stations = crate::batch::distinct_sorted(&token.stations);
                if !stations.is_empty() {
                    let mut insert = QueryBuilder::<$database>::new(
                        "INSERT INTO token_stations (token_id, station_key) ",
                    );
                    insert.push_values(&stations, |mut values, station| {
                        values
                            .push_bind(token.id.as_str())
                            .push_bind(station.as_str());
                    });
                    insert.build().execute(&mut *connection).await?;
                }
                Ok(())
            }

            /// Marks the token revoked. Revoking it again keeps the first revocation time.
            pub(crate) async fn revoke_token(
                pool: &Pool<$database>,
                id: &str,
                now_ms: i64,
            ) -> Result<(), StoreError> {
                let result = sqlx::query(
                    "UPDATE tokens SET revoked_at_ms = COALESCE(revoked_at_ms, $2) WHERE id = $1",
                )
                .bind(id)
                .bind(now_ms)
                .execute(pool)
                .await?;
                if result.rows_affected() == 0 {
                    return Err(StoreError::NotFound(format!("unknown token {id}")));
                }
                Ok(())
            }

            pub(crate) async fn count(
                pool: &Pool<$database>,
                statement: &'static str,
            ) -> Result<u64, StoreError> {
                let (count,): (i64,) = sqlx::query_as(statement).fetch_one(pool).await?;
                u64::try_from(count)
                    .map_err(|_| StoreError::Other(format!("negative count {count}")))
            }

            const READING_COLUMNS: &str = "SELECT r.id, s.key, q.key, r.observed_at_ms, \
                r.revision, r.value, r.value_as_sent, r.unit_as_sent, r.received_at_ms \
                FROM readings r JOIN stations s ON s.id = r.station_id \
                JOIN quantities q ON q.id = r.quantity_id ";

            /// The current revision of each reading of one station and quantity with
            /// `from_ms <= observed_at_ms < to_ms`, oldest first.
            pub(crate) async fn readings_history(
                pool: &Pool<$database>,
                station: &str,
                quantity: &str,
                from_ms: i64,
                to_ms: i64,
            ) -> Result<Vec<StoredReading>, StoreError> {
                let statement = format!(
                    "{READING_COLUMNS} WHERE s.key = $1 AND q.key = $2 \
                     AND r.observed_at_ms >= $3 AND r.observed_at_ms < $4 \
                     AND NOT EXISTS (SELECT 1 FROM readings newer \
                     WHERE newer.observed_at_ms = r.observed_at_ms \
                     AND newer.station_id = r.station_id \
                     AND newer.quantity_id = r.quantity_id AND newer.revision > r.revision) \
                     ORDER BY r.observed_at_ms"
                );
                let rows = sqlx::query(&statement)
                    .bind(station)
                    .bind(quantity)
                    .bind(from_ms)
                    .bind(to_ms)
                    .fetch_all(pool)
                    .await?;
                rows.iter().map(stored_reading).collect()
            }

            /// Every stored revision of one reading key, oldest (revision 0) first.
            pub(crate) async fn reading_revisions(
                pool: &Pool<$database>,
                key: &ReadingKey,
            ) -> Result<Vec<StoredReading>, StoreError> {
                let statement = format!(
                    "{READING_COLUMNS} WHERE s.key = $1 AND q.key = $2 \
                     AND r.observed_at_ms = $3 ORDER BY r.revision"
                );
                let rows = sqlx::query(&statement)
                    .bind(&key.station)
                    .bind(&key.quantity)
                    .bind(key.observed_at_ms)
                    .fetch_all(pool)
                    .await?;
                rows.iter().map(stored_reading).collect()
            }

            fn stored_reading(
                row: &<$database as sqlx::Database>::Row,
            ) -> Result<StoredReading, StoreError> {
                Ok(StoredReading {
                    id: row.try_get(0)?,
                    station: row.try_get(1)?,
                    quantity: row.try_get(2)?,
                    observed_at_ms: row.try_get(3)?,
                    revision: row.try_get(4)?,
                    value: row.try_get(5)?,
                    value_as_sent: row.try_get(6)?,
                    unit_as_sent: row.try_get(7)?,
                    received_at_ms: row.try_get(8)?,
                })
            }
        }
    };
}

pub(crate) use shared_queries;
