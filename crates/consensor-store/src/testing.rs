//! Support for tests of Consensor's crates that need a real database: a fresh SQLite file in a
//! temporary directory, or a fresh database on the PostgreSQL server named by
//! `CONSENSOR_TEST_POSTGRES_URL`, removed when the test is done. Enabled by the `testing` feature.

use std::sync::atomic::{AtomicU64, Ordering};

use crate::{connect, AnyStore, ReadingKey, Store, StoredReading};

/// Every stored revision of one reading key, oldest (revision 0) first.
pub async fn revisions_of(
    store: &AnyStore,
    station: &str,
    quantity: &str,
    observed_at_ms: i64,
) -> Vec<StoredReading> {
    store
        .reading_revisions(&ReadingKey {
            station: station.to_owned(),
            quantity: quantity.to_owned(),
            observed_at_ms,
        })
        .await
        .expect("revisions")
}

/// The name of a test SQLite database's file in its directory.
const SQLITE_FILE: &str = "consensor.db";

/// A fresh database and how to remove it.
pub struct TestDatabase {
    /// The URL a server or store opens it with.
    pub url: String,
    directory: Option<tempfile::TempDir>,
    postgres: Option<(String, String)>,
}

impl TestDatabase {
    /// An SQLite file that does not exist yet, in a new temporary directory.
    pub fn sqlite() -> TestDatabase {
        let directory = tempfile::tempdir().expect("temporary directory");
        let url = format!("sqlite://{}", directory.path().join(SQLITE_FILE).display());
        TestDatabase {
            url,
            directory: Some(directory),
            postgres: None,
        }
    }

    /// A new, empty database on the test server; `None`, after a loud notice on stderr, when
    /// `CONSENSOR_TEST_POSTGRES_URL` is unset.
    pub async fn postgres() -> Option<TestDatabase> {
        let Ok(server_url) = std::env::var("CONSENSOR_TEST_POSTGRES_URL") else {
            announce_postgres_skipped();
            return None;
        };
        static NEXT: AtomicU64 = AtomicU64::new(0);
        let nanos = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .expect("clock after 1970")
            .subsec_nanos();
        let name = format!(
            "consensor_test_{}_{}_{}",
            std::process::id(),
            nanos,
            NEXT.fetch_add(1, Ordering::Relaxed)
        );
        run_on_server(&server_url, &format!("CREATE DATABASE {name}")).await;
        Some(TestDatabase {
            url: database_url(&server_url, &name),
            directory: None,
            postgres: Some((server_url, name)),
        })
    }

    /// The directory of an SQLite database (for tests that look at its files).
    pub fn directory(&self) -> Option<&std::path::Path> {
        self.directory.as_ref().map(|d| d.path())
    }

    /// The SQLite database's file (for tests that open it beside the store).
    pub fn sqlite_file(&self) -> Option<std::path::PathBuf> {
        self.directory()
            .map(|directory| directory.join(SQLITE_FILE))
    }

    /// Opens a store on it (running the migrations).
    pub async fn open(&self) -> AnyStore {
        connect(&self.url).await.expect("open test store")
    }

    /// Drops a PostgreSQL test database (an SQLite one goes with its directory).
    pub async fn finish(self) {
        if let Some((server_url, name)) = &self.postgres {
            run_on_server(
                server_url,
                &format!("DROP DATABASE IF EXISTS {name} WITH (FORCE)"),
            )
            .await;
        }
    }
}

/// Says loudly, once per test process, that the PostgreSQL variants are skipped. It writes to the
/// stderr handle itself because libtest captures `eprintln!` of passing tests, which would hide it.
pub fn announce_postgres_skipped() {
    use std::io::Write;
    static ONCE: std::sync::Once = std::sync::Once::new();
    ONCE.call_once(|| {
        let _ = writeln!(
            std::io::stderr(),
            "\n!!! CONSENSOR_TEST_POSTGRES_URL is not set: SKIPPING every PostgreSQL variant. Set it \
             (e.g. postgres://postgres@127.0.0.1:5432/test) to run them. !!!\n"
        );
    });
}

/// The URL of database `name` on the server of `server_url` (same user, host and options).
pub fn database_url(server_url: &str, name: &str) -> String {
    let (without_query, query) = match server_url.split_once('?') {
        Some((base, query)) => (base, format!("?{query}")),
        None => (server_url, String::new()),
    };
    let scheme_end = without_query.find("://").expect("URL with a scheme") + 3;
    let authority_end = without_query[scheme_end..]
        .find('/')
        .map_or(without_query.len(), |slash| scheme_end + slash);
    format!("{}/{name}{query}", &without_query[..authority_end])
}

/// Runs one statement on the server's own database (for CREATE/DROP DATABASE).
pub async fn run_on_server(server_url: &str, statement: &str) {
    use sqlx::Connection;
    let mut connection = sqlx::PgConnection::connect(server_url)
        .await
        .expect("connect to the PostgreSQL test server");
    sqlx::raw_sql(statement)
        .execute(&mut connection)
        .await
        .unwrap_or_else(|error| panic!("{statement}: {error}"));
    connection.close().await.expect("close admin connection");
}
