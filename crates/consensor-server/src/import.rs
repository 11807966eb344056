//! `consensor import`: bulk-loads historical readings from files, through the same checks as
//! `POST /v1/readings` (API.md "Command line").
//!
//! First the station file is read and every station in it is created or updated, as
//! `PUT /v1/stations/{id}` would. Then each reading file is read line by line; each line is decoded
//! by the ingest decoders ([`crate::ingest::decode_text_reading`] for a CSV row,
//! [`crate::ingest::decode_ndjson_line`] for an NDJSON line) and every `batch_size` readings are
//! resolved against the stations and the quantity table ([`crate::ingest::resolve_readings`]) and
//! stored in one transaction by `Store::insert_batch`, which marks their intervals pending, so the
//! next `consensor serve` computes them.
//!
//! A bad line stops the import. The batches committed before it stay stored, and the error message
//! says how many readings they held; importing the same files again after fixing the line is safe,
//! since a reading sent again is counted as a duplicate and stored once.
//!
//! Station file (CSV, UTF-8, a header line naming the columns in any order):
//! `station,area,name,lat,lon,elevation_m`; `station`, `area` and `name` are required, the other
//! columns may be left out or left empty. The areas must exist already (`PUT /v1/areas/{area}`),
//! unless `--area-interval` is given: then each missing area is created with that interval and its
//! id as its name, and existing areas are left as they are.
//!
//! Reading files: CSV with the header `station,quantity,observed_at,value,unit` (any order; `unit`
//! may be left out; an empty `value` means "no value", an empty `unit` the canonical unit), or
//! NDJSON with one reading object per line, exactly as the HTTP NDJSON body.

use std::collections::{HashMap, HashSet};
use std::fmt;
use std::io::{BufRead, IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{bail, Context};
use consensor_core::ids::IntervalLength;
use consensor_store::{AnyStore, NewArea, NewStation, Store, StoreError};

use crate::config::Config;
use crate::ingest::{self, DecodeError, DecodeLimits, DecodedReading, FieldError, TextReading};
use crate::network_fields::{self, ELEVATION_LIMIT_M, LAT_LIMIT, LON_LIMIT};
use crate::state::{Clock, SystemClock};

/// The readings stored in one transaction unless `--batch-size` says otherwise.
pub const DEFAULT_BATCH_SIZE: usize = 5000;

/// The largest `--batch-size`: the HTTP ingest's default batch limit.
const MAX_BATCH_SIZE: usize = 100_000;

/// The reading files' format.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FileFormat {
    Csv,
    Ndjson,
}

/// What `consensor import` was asked to do.
#[derive(Debug, Clone, PartialEq)]
pub struct ImportOptions {
    pub station_file: PathBuf,
    pub format: FileFormat,
    pub files: Vec<PathBuf>,
    /// When set, areas named in the station file that do not exist are created with this interval.
    pub area_interval: Option<IntervalLength>,
    /// How many readings each transaction stores.
    pub batch_size: usize,
}

impl ImportOptions {
    /// Parses `--station-file FILE --format csv|ndjson [--area-interval I] [--batch-size N]
    /// [--config FILE] [--database URL] FILE...`. Returns the options and the configuration flags
    /// (`--config`, `--database`), which the caller loads with the same layering as `serve`.
    pub fn parse(args: &[String]) -> anyhow::Result<(ImportOptions, Vec<String>)> {
        let mut station_file = None;
        let mut format = None;
        let mut area_interval = None;
        let mut batch_size = DEFAULT_BATCH_SIZE;
        let mut files = Vec::new();
        let mut config_flags = Vec::new();
        let mut rest = args.iter();
        while let Some(arg) = rest.next() {
            if !arg.starts_with("--") {
                files.push(PathBuf::from(arg));
                continue;
            }
            let (name, value) = crate::cli::option_value(arg, &mut rest)?;
            match name {
                "--station-file" => station_file = Some(PathBuf::from(value)),
                "--format" => {
                    format = Some(match value.as_str() {
                        "csv" => FileFormat::Csv,
                        "ndjson" => FileFormat::Ndjson,
                        other => bail!("--format: {other:?} is not one of csv, ndjson"),
                    })
                }
                "--area-interval" => {
                    area_interval = Some(
                        IntervalLength::parse(&value)
                            .map_err(|error| anyhow::anyhow!("--area-interval: {error}"))?,
                    )
                }
                "--batch-size" => {
                    batch_size = value
                        .parse::<usize>()
                        .ok()
                        .filter(|n| (1..=MAX_BATCH_SIZE).contains(n))
                        .with_context(|| {
                            format!("--batch-size: {value:?} is not a whole number from 1 to {MAX_BATCH_SIZE}")
                        })?
                }
                "--config" | "--database" => {
                    config_flags.push(name.to_owned());
                    config_flags.push(value);
                }
                other => bail!("unknown option {other:?}"),
            }
        }
        let station_file = station_file.context("--station-file FILE is required")?;
        let format = format.context("--format csv|ndjson is required")?;
        if files.is_empty() {
            bail!("name at least one file of readings to import");
        }
        Ok((
            ImportOptions {
                station_file,
                format,
                files,
                area_interval,
                batch_size,
            },
            config_flags,
        ))
    }
}

/// What an import did.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ImportSummary {
    pub files: usize,
    /// Readings read from the files and stored or found duplicate: `accepted + duplicates`.
    pub readings: u64,
    /// Newly stored readings, revisions included, as `accepted` of `POST /v1/readings`.
    pub accepted: u64,
    pub duplicates: u64,
    /// How many of the `accepted` readings were revisions of a stored reading.
    pub revised: u64,
    pub areas_created: u64,
    pub stations_created: u64,
    pub stations_updated: u64,
}

impl fmt::Display for ImportSummary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "imported {} readings from {} file(s): accepted {}, duplicates {}, revised {}; \
             stations created {}, updated {}; areas created {}",
            self.readings,
            self.files,
            self.accepted,
            self.duplicates,
            self.revised,
            self.stations_created,
            self.stations_updated,
            self.areas_created
        )
    }
}

/// Runs the import on the database of `config`; see the module documentation.
pub async fn run(options: ImportOptions, config: Config) -> anyhow::Result<ImportSummary> {
    let stations = read_station_file(&options.station_file)?;
    let state = crate::serve::open_state(config, Arc::new(SystemClock)).await?;
    let result = import(
        &options,
        &stations,
        &state.store,
        &state.config,
        &*state.clock,
    )
    .await;
    state.store.close().await;
    result
}

async fn import(
    options: &ImportOptions,
    stations: &[StationRow],
    store: &AnyStore,
    config: &Config,
    clock: &dyn Clock,
) -> anyhow::Result<ImportSummary> {
    let mut summary = ImportSummary::default();
    upsert_network(options, stations, store, &mut summary).await?;
    let mut importer = Importer {
        store,
        config,
        clock,
        // Observation times are judged against the clock at the start, as a request's are.
        now_ms: clock.now_ms(),
        limits: DecodeLimits::default(),
        batch_size: options.batch_size,
        batch: Vec::with_capacity(options.batch_size),
        summary,
        progress: Progress::new(options.files.len()),
    };
    for (number, path) in options.files.iter().enumerate() {
        importer.progress.file = number + 1;
        match options.format {
            FileFormat::Csv => importer.import_csv(path).await?,
            FileFormat::Ndjson => importer.import_ndjson(path).await?,
        }
        importer.summary.files += 1;
    }
    importer.progress.finish(importer.summary.readings);
    Ok(importer.summary)
}

/// One row of the station file.
#[derive(Debug, Clone, PartialEq)]
struct StationRow {
    line: u64,
    station: NewStation,
}

/// The columns of the station file; `station`, `area` and `name` are required.
const STATION_COLUMNS: [&str; 6] = ["station", "area", "name", "lat", "lon", "elevation_m"];

fn read_station_file(path: &Path) -> anyhow::Result<Vec<StationRow>> {
    let mut reader = csv::ReaderBuilder::new()
        .from_path(path)
        .with_context(|| format!("could not open the station file {}", path.display()))?;
    let columns = columns_of(&mut reader, path, &STATION_COLUMNS, 3)?;
    let mut rows: Vec<StationRow> = Vec::new();
    let mut seen: HashMap<String, u64> = HashMap::new();
    let mut record = csv::StringRecord::new();
    while read_record(&mut reader, &mut record, path)? {
        let line = line_of(&record);
        let field = |slot: usize| columns[slot].map_or("", |i| &record[i]);
        let fail = |name: &str, reason: String| -> anyhow::Error {
            anyhow::anyhow!(
                "{}:{line}: field {name}: {reason}; nothing was imported",
                path.display()
            )
        };
        let (key, area, name) = (field(0), field(1), field(2));
        // The same rules as `PUT /v1/stations/{id}` (crate::network_fields).
        for (column, id) in [("station", key), ("area", area)] {
            network_fields::check_id(id)
                .map_err(|reason| fail(column, format!("{id:?} {reason}")))?;
        }
        network_fields::check_name(name).map_err(|reason| fail("name", reason.into()))?;
        let coordinate = |slot: usize, limit: f64| -> anyhow::Result<Option<f64>> {
            let text = field(slot);
            if text.is_empty() {
                return Ok(None);
            }
            // Text that is no number is refused as a number out of range is.
            let value = text.parse::<f64>().unwrap_or(f64::NAN);
            network_fields::check_coordinate(value, limit)
                .map(|()| Some(value))
                .map_err(|rule| fail(STATION_COLUMNS[slot], format!("{text:?} {rule}")))
        };
        let lat = coordinate(3, LAT_LIMIT)?;
        let lon = coordinate(4, LON_LIMIT)?;
        let elevation_m = coordinate(5, ELEVATION_LIMIT_M)?;
        if let Some(first) = seen.insert(key.to_owned(), line) {
            return Err(fail(
                "station",
                format!("station {key:?} appears twice (also on line {first})"),
            ));
        }
        rows.push(StationRow {
            line,
            station: NewStation {
                key: key.to_owned(),
                area_key: area.to_owned(),
                name: name.to_owned(),
                lat,
                lon,
                elevation_m,
            },
        });
    }
    Ok(rows)
}

/// Creates the missing areas (with `--area-interval`) and upserts every station of the file.
async fn upsert_network(
    options: &ImportOptions,
    stations: &[StationRow],
    store: &AnyStore,
    summary: &mut ImportSummary,
) -> anyhow::Result<()> {
    let mut areas: HashSet<String> = store
        .list_areas()
        .await
        .context("could not list the areas")?
        .into_iter()
        .map(|area| area.key)
        .collect();
    let file = options.station_file.display();
    for row in stations {
        let area = &row.station.area_key;
        if areas.contains(area) {
            continue;
        }
        let Some(interval) = options.area_interval else {
            bail!(
                "{file}:{}: field area: area {area:?} does not exist; create it first with \
                 PUT /v1/areas/{area}, or pass --area-interval to create missing areas; \
                 nothing was imported",
                row.line
            );
        };
        store
            .upsert_area(&NewArea {
                key: area.clone(),
                name: area.clone(),
                interval_ms: interval.as_millis(),
            })
            .await
            .with_context(|| format!("could not create the area {area:?}"))?;
        summary.areas_created += 1;
        areas.insert(area.clone());
    }
    for row in stations {
        match store.upsert_station(&row.station).await {
            Ok(upserted) if upserted.created => summary.stations_created += 1,
            Ok(_) => summary.stations_updated += 1,
            Err(StoreError::NotFound(_)) => bail!(
                "{file}:{}: field area: area {:?} does not exist",
                row.line,
                row.station.area_key
            ),
            Err(error) => {
                return Err(error)
                    .with_context(|| format!("could not store the station {:?}", row.station.key))
            }
        }
    }
    Ok(())
}

/// The columns of a reading CSV file; `unit` is optional.
const READING_COLUMNS: [&str; 5] = ["station", "quantity", "observed_at", "value", "unit"];

/// Reads the reading files and stores their readings batch by batch.
struct Importer<'a> {
    store: &'a AnyStore,
    config: &'a Config,
    clock: &'a dyn Clock,
    now_ms: i64,
    limits: DecodeLimits,
    batch_size: usize,
    /// The readings decoded since the last commit, each with its line number.
    batch: Vec<(u64, DecodedReading)>,
    summary: ImportSummary,
    progress: Progress,
}

impl Importer<'_> {
    async fn import_csv(&mut self, path: &Path) -> anyhow::Result<()> {
        let mut reader = csv::ReaderBuilder::new()
            .from_path(path)
            .with_context(|| format!("could not open {}", path.display()))?;
        let columns = columns_of(&mut reader, path, &READING_COLUMNS, 4)?;
        let mut record = csv::StringRecord::new();
        loop {
            if !read_record(&mut reader, &mut record, path)
                .map_err(|error| self.stopped(error, self.batch.len()))?
            {
                break;
            }
            let line = line_of(&record);
            let field = |slot: usize| columns[slot].map_or("", |i| &record[i]);
            let fields = TextReading {
                station: field(0),
                quantity: field(1),
                observed_at: field(2),
                value: field(3),
                unit: columns[4].map(|i| &record[i]),
            };
            match ingest::decode_text_reading(&fields, self.now_ms, &self.limits) {
                Ok(reading) => self.push(path, line, reading).await?,
                Err(error) => return Err(self.bad_line(path, line, error)),
            }
        }
        self.commit(path).await
    }

    async fn import_ndjson(&mut self, path: &Path) -> anyhow::Result<()> {
        let file = std::fs::File::open(path)
            .with_context(|| format!("could not open {}", path.display()))?;
        let mut reader = std::io::BufReader::new(file);
        let mut buffer = Vec::new();
        let mut line = 0u64;
        loop {
            buffer.clear();
            let read = reader
                .read_until(b'\n', &mut buffer)
                .with_context(|| format!("could not read {}", path.display()))
                .map_err(|error| self.stopped(error, self.batch.len()))?;
            if read == 0 {
                break;
            }
            line += 1;
            let mut text = buffer.strip_suffix(b"\n").unwrap_or(&buffer);
            if line == 1 {
                // RFC 8259 §8.1 lets a parser ignore a byte order mark, as the HTTP ingest does.
                text = text.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(text);
            }
            match ingest::decode_ndjson_line(text, self.now_ms, &self.limits) {
                Ok(Some(reading)) => self.push(path, line, reading).await?,
                Ok(None) => {}
                Err(error) => return Err(self.bad_line(path, line, error)),
            }
        }
        self.commit(path).await
    }

    async fn push(
        &mut self,
        path: &Path,
        line: u64,
        reading: DecodedReading,
    ) -> anyhow::Result<()> {
        self.batch.push((line, reading));
        if self.batch.len() >= self.batch_size {
            self.commit(path).await?;
        }
        Ok(())
    }

    /// Resolves the batch (stations, quantities, units) and stores it in one transaction.
    async fn commit(&mut self, path: &Path) -> anyhow::Result<()> {
        if self.batch.is_empty() {
            return Ok(());
        }
        let batch = std::mem::take(&mut self.batch);
        let lines: Vec<u64> = batch.iter().map(|(line, _)| *line).collect();
        let decoded: Vec<(usize, DecodedReading)> = batch
            .into_iter()
            .enumerate()
            .map(|(index, (_, reading))| (index, reading))
            .collect();
        let known = self
            .store
            .station_keys_lookup(&ingest::station_keys(&decoded))
            .await
            .context("could not look the stations up")
            .map_err(|error| self.stopped(error, lines.len()))?;
        let mut errors = Vec::new();
        let readings = ingest::resolve_readings(
            decoded,
            |station| known.contains_key(station),
            self.config,
            &mut errors,
        );
        if let Some(first) = errors.first() {
            let index = first.index;
            let errors: Vec<FieldError> = errors.into_iter().filter(|e| e.index == index).collect();
            let error = self.located(path, lines[index], DecodeError::Invalid(errors));
            return Err(self.stopped(error, lines.len()));
        }
        let outcome = self
            .store
            .insert_batch(&readings, self.clock.now_ms())
            .await
            .context("could not store a batch")
            .map_err(|error| self.stopped(error, lines.len()))?;
        self.summary.accepted += outcome.accepted;
        self.summary.duplicates += outcome.duplicates;
        self.summary.revised += outcome.revised;
        self.summary.readings += outcome.accepted + outcome.duplicates;
        self.progress.tick(self.summary.readings);
        Ok(())
    }

    /// The error for a bad line read since the last commit: where, which field, why, and what was
    /// stored before it.
    fn bad_line(&self, path: &Path, line: u64, error: DecodeError) -> anyhow::Error {
        self.stopped(self.located(path, line, error), self.batch.len())
    }

    /// `FILE:LINE: field F: reason` for every bad field of one line.
    fn located(&self, path: &Path, line: u64, error: DecodeError) -> anyhow::Error {
        let what = match error {
            DecodeError::Invalid(errors) => errors
                .iter()
                .map(|e| format!("field {}: {}", e.field, e.reason))
                .collect::<Vec<_>>()
                .join("; "),
            DecodeError::Malformed(reason) => reason,
            other => other.to_string(),
        };
        anyhow::anyhow!("{}:{line}: {what}", path.display())
    }

    /// Adds to `error` what was stored before the import stopped; `pending` readings of the batch
    /// being read or committed were not stored.
    fn stopped(&self, error: anyhow::Error, pending: usize) -> anyhow::Error {
        self.progress.finish(self.summary.readings);
        let s = &self.summary;
        let stored = if s.readings == 0 {
            "the import stopped before any reading was stored".to_owned()
        } else {
            format!(
                "the import stopped: {} readings of earlier batches were stored before the error \
                 (accepted {}, duplicates {}, revised {}) and stay stored",
                s.readings, s.accepted, s.duplicates, s.revised
            )
        };
        let not_stored = if pending == 0 {
            String::new()
        } else {
            format!("; the {pending} readings read since the last commit were not stored")
        };
        let again = if s.readings == 0 {
            ""
        } else {
            ": readings already stored count as duplicates"
        };
        anyhow::anyhow!(
            "{error:#}\n{stored}{not_stored}; fix the file and run the same import again{again}"
        )
    }
}

/// Maps the header of a CSV file to the known columns: `columns[i]` is the position of
/// `known[i]`. The first `required` known columns must be present; an unknown column is an error.
fn columns_of(
    reader: &mut csv::Reader<std::fs::File>,
    path: &Path,
    known: &[&str],
    required: usize,
) -> anyhow::Result<Vec<Option<usize>>> {
    let headers = reader
        .headers()
        .with_context(|| format!("{}:1: could not read the header line", path.display()))?;
    let mut columns = vec![None; known.len()];
    for (position, name) in headers.iter().enumerate() {
        let Some(slot) = known.iter().position(|k| *k == name.trim()) else {
            bail!(
                "{}:1: unknown column {name:?}; the columns are {}",
                path.display(),
                known.join(",")
            );
        };
        if columns[slot].replace(position).is_some() {
            bail!("{}:1: column {name:?} appears twice", path.display());
        }
    }
    if let Some(missing) = (0..required).find(|&slot| columns[slot].is_none()) {
        bail!(
            "{}:1: the header has no column {:?}; the columns are {} ({} optional)",
            path.display(),
            known[missing],
            known.join(","),
            known[required..].join(", ")
        );
    }
    Ok(columns)
}

/// Reads the next record; `false` at the end. A CSV syntax error names the file and line.
fn read_record(
    reader: &mut csv::Reader<std::fs::File>,
    record: &mut csv::StringRecord,
    path: &Path,
) -> anyhow::Result<bool> {
    reader.read_record(record).map_err(|error| {
        let line = error.position().map_or(0, csv::Position::line);
        let reason = match error.kind() {
            csv::ErrorKind::UnequalLengths {
                expected_len, len, ..
            } => format!("the line has {len} fields, the header {expected_len}"),
            csv::ErrorKind::Utf8 { .. } => "the line is not valid UTF-8".to_owned(),
            _ => error.to_string(),
        };
        anyhow::anyhow!("{}:{line}: {reason}", path.display())
    })
}

fn line_of(record: &csv::StringRecord) -> u64 {
    record.position().map_or(0, csv::Position::line)
}

/// A progress line on stderr, at most once a second: rewritten in place on a terminal, one line
/// each time otherwise (a log file then shows the progress too).
struct Progress {
    files: usize,
    file: usize,
    last: Option<Instant>,
    terminal: bool,
    shown: std::cell::Cell<bool>,
}

const PROGRESS_EVERY: Duration = Duration::from_secs(1);

impl Progress {
    fn new(files: usize) -> Progress {
        Progress {
            files,
            file: 0,
            last: None,
            terminal: std::io::stderr().is_terminal(),
            shown: std::cell::Cell::new(false),
        }
    }

    fn tick(&mut self, readings: u64) {
        let now = Instant::now();
        if self
            .last
            .is_some_and(|last| now.duration_since(last) < PROGRESS_EVERY)
        {
            return;
        }
        self.last = Some(now);
        self.show(readings, false);
    }

    /// Ends the progress line (if one was shown) with the final count.
    fn finish(&self, readings: u64) {
        if self.shown.get() {
            self.show(readings, true);
        }
    }

    fn show(&self, readings: u64, last: bool) {
        let text = format!(
            "imported {readings} readings (file {} of {})",
            self.file, self.files
        );
        let mut stderr = std::io::stderr().lock();
        let _ = if self.terminal {
            write!(
                stderr,
                "\r{text}{}\x1b[K{}",
                if last { "" } else { "…" },
                if last { "\n" } else { "" }
            )
        } else {
            writeln!(stderr, "{text}{}", if last { "" } else { "…" })
        };
        let _ = stderr.flush();
        self.shown.set(!last);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn args(text: &str) -> Vec<String> {
        text.split_whitespace().map(str::to_owned).collect()
    }

    #[test]
    fn options_parse() {
        let (options, config) = ImportOptions::parse(&args(
            "--station-file s.csv --format=csv --database sqlite://x.db --batch-size 10 a.csv b.csv",
        ))
        .unwrap();
        assert_eq!(
            options,
            ImportOptions {
                station_file: "s.csv".into(),
                format: FileFormat::Csv,
                files: vec!["a.csv".into(), "b.csv".into()],
                area_interval: None,
                batch_size: 10,
            }
        );
        assert_eq!(config, args("--database sqlite://x.db"));
        let (options, _) = ImportOptions::parse(&args(
            "--format ndjson --station-file s --area-interval 10m r",
        ))
        .unwrap();
        assert_eq!(options.format, FileFormat::Ndjson);
        assert_eq!(options.area_interval, IntervalLength::parse("10m").ok());
        for (bad, part) in [
            ("--format csv a.csv", "--station-file"),
            ("--station-file s a.csv", "--format"),
            ("--station-file s --format csv", "at least one file"),
            ("--station-file s --format tsv a", "not one of csv, ndjson"),
            (
                "--station-file s --format csv --batch-size 0 a",
                "--batch-size",
            ),
            (
                "--station-file s --format csv --area-interval 7m a",
                "--area-interval",
            ),
            (
                "--station-file s --format csv --listen 1 a",
                "unknown option",
            ),
            ("--station-file", "needs a value"),
        ] {
            let error = ImportOptions::parse(&args(bad)).unwrap_err().to_string();
            assert!(error.contains(part), "{bad}: {error}");
        }
    }
}
