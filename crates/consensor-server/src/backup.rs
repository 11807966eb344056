//! `consensor backup`: an online, consistent copy of a live SQLite database.
//!
//! The copy is made with SQLite's `VACUUM INTO`, which reads the whole database inside one read
//! transaction and writes it, compacted, to a new file. In WAL mode a reader never blocks writers,
//! so `consensor serve` keeps accepting readings while the copy runs, and the copy holds exactly
//! the transactions committed when the read began: every batch answered 200 before the backup
//! started is in it, and a batch is either wholly in it or not at all.
//!
//! SQLite does not sync the file `VACUUM INTO` writes, and an interrupted copy leaves a partial
//! file. So the copy goes to a hidden temporary file beside the target, is synced, checked with
//! `PRAGMA integrity_check`, and only then linked to its final name, which is refused if it exists
//! (a backup never overwrites anything). The directory is synced last, so the name survives a
//! power loss too.
//!
//! The copy may hold claims that the live server's worker had on pending intervals when the
//! snapshot was taken (`pending_buckets.claimed_by`). No worker of a restored database holds them,
//! and a claim is only taken over once it is `stale_claim_seconds` old, so the copy's claims are
//! released before it is checked: those intervals stay pending and are computed as soon as a
//! server runs on the restored file.
//!
//! PostgreSQL databases are refused with a pointer to `pg_dump`, PostgreSQL's own consistent
//! online dump. Restoring a backup (deploy/README.md): stop the server, copy the backup over the
//! database file, remove the old `-wal` and `-shm` files beside it, start the server.
//!
//! The SQL (`VACUUM INTO`, releasing the copy's claims, the integrity check) lives in
//! `consensor_store::backup`, on connections of its own with no migrations, so a backup never
//! changes the live database's schema; this module handles the files and the command.

use std::fmt;
use std::path::{Path, PathBuf};
use std::time::Duration;

use anyhow::{bail, Context};
use consensor_store::Backend;

use crate::config::{redact_url, Config};

/// How long the backup waits for a lock held by the live server before giving up. `VACUUM INTO`
/// only needs a read lock, which in WAL mode is refused only while a checkpoint resets the log.
const BUSY_TIMEOUT: Duration = Duration::from_secs(30);

/// What `consensor backup` was asked to do.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct BackupOptions {
    /// The file to create; it must not exist.
    pub to: PathBuf,
}

impl BackupOptions {
    /// Parses `--to PATH [--config FILE] [--database URL]`. Returns the options and the
    /// configuration flags (`--config`, `--database`), which the caller loads with the same
    /// layering as `serve`.
    pub fn parse(args: &[String]) -> anyhow::Result<(BackupOptions, Vec<String>)> {
        let mut to = None;
        let mut config_flags = Vec::new();
        let mut rest = args.iter();
        while let Some(arg) = rest.next() {
            let (name, inline) = match arg.split_once('=') {
                Some((name, value)) if name.starts_with("--") => (name, Some(value.to_owned())),
                _ => (arg.as_str(), None),
            };
            if !matches!(name, "--to" | "--config" | "--database") {
                bail!("unknown option {name:?}");
            }
            let value = match inline {
                Some(value) => value,
                None => rest
                    .next()
                    .cloned()
                    .with_context(|| format!("{name} needs a value"))?,
            };
            if value.is_empty() {
                bail!("{name} needs a value");
            }
            if name == "--to" {
                to = Some(PathBuf::from(value));
            } else {
                config_flags.push(name.to_owned());
                config_flags.push(value);
            }
        }
        let to = to.context("--to PATH is required (the backup file to create)")?;
        Ok((BackupOptions { to }, config_flags))
    }
}

/// What a backup wrote.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct BackupSummary {
    /// The database backed up, with any password redacted.
    pub database: String,
    pub path: PathBuf,
    pub bytes: u64,
    /// Rows of the `readings` table in the copy (revisions included, as `GET /v1/status`).
    pub readings: u64,
    /// Claims of the live worker found in the copy and released there.
    pub claims_released: u64,
}

impl fmt::Display for BackupSummary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "backed up {} to {}: {} bytes, {} readings, integrity check ok",
            self.database,
            self.path.display(),
            self.bytes,
            self.readings
        )?;
        if self.claims_released > 0 {
            write!(
                f,
                "; {} interval(s) the worker was computing stay pending in the copy",
                self.claims_released
            )?;
        }
        Ok(())
    }
}

/// Backs up the database of `config` to `options.to`; see the module documentation.
pub async fn run(options: BackupOptions, config: Config) -> anyhow::Result<BackupSummary> {
    if config.backend == Backend::Postgres {
        bail!(
            "{} is a PostgreSQL database; consensor backup copies SQLite files only. Back it up \
             with PostgreSQL's own tools, e.g. `pg_dump --format=custom --file=consensor.dump \
             <database>` (restore with pg_restore), or continuous archiving",
            redact_url(&config.database_url)
        );
    }
    backup_sqlite(&config.database_url, &options.to).await
}

/// Copies the SQLite database at `database_url` (`sqlite://path` or `sqlite:path`) to the new
/// file `to`.
pub async fn backup_sqlite(database_url: &str, to: &Path) -> anyhow::Result<BackupSummary> {
    let target = Target::prepare(to)?;
    let copied =
        consensor_store::backup::vacuum_sqlite_into(database_url, &target.partial, BUSY_TIMEOUT)
            .await;
    if let Err(error) = copied {
        target.discard_partial();
        return Err(error.into());
    }
    let checked = async {
        let claims_released =
            consensor_store::backup::release_claims_in_copy(&target.partial).await?;
        std::fs::File::open(&target.partial)
            .and_then(|file| file.sync_all())
            .with_context(|| format!("could not sync {} to disk", target.partial.display()))?;
        let readings = consensor_store::backup::check_copy(&target.partial).await?;
        anyhow::Ok((readings, claims_released))
    }
    .await;
    let (readings, claims_released) = match checked {
        Ok(checked) => checked,
        Err(error) => {
            target.discard_partial();
            return Err(error);
        }
    };
    let bytes = target.publish()?;
    Ok(BackupSummary {
        database: redact_url(database_url),
        path: target.path,
        bytes,
        readings,
        claims_released,
    })
}

/// The backup file to create and the temporary file the copy is written to first.
struct Target {
    path: PathBuf,
    /// A hidden file in the same directory (so the final link stays on one file system), named
    /// after this process so two backups running at once never share it.
    partial: PathBuf,
    directory: PathBuf,
}

impl Target {
    /// Refuses an existing `to` or a missing directory; the temporary file's path is absolute, so
    /// SQLite never reads it as a `file:` URI.
    fn prepare(to: &Path) -> anyhow::Result<Target> {
        if to.symlink_metadata().is_ok() {
            bail!(
                "--to {}: the file already exists; a backup never overwrites, choose a new name",
                to.display()
            );
        }
        let name = to
            .file_name()
            .with_context(|| format!("--to {}: not a file name", to.display()))?;
        let parent = match to.parent() {
            Some(parent) if !parent.as_os_str().is_empty() => parent,
            _ => Path::new("."),
        };
        let directory = parent.canonicalize().with_context(|| {
            format!(
                "--to {}: the directory {} does not exist",
                to.display(),
                parent.display()
            )
        })?;
        let mut partial_name = std::ffi::OsString::from(".");
        partial_name.push(name);
        partial_name.push(format!(".partial-{}", std::process::id()));
        let partial = directory.join(partial_name);
        // A leftover of an earlier, interrupted run of a process with the same id: never a backup.
        let _ = std::fs::remove_file(&partial);
        Ok(Target {
            path: directory.join(name),
            partial,
            directory,
        })
    }

    /// Gives the checked copy its final name without ever replacing a file that appeared there
    /// meanwhile (a hard link fails if the name exists), then syncs the directory. Returns the
    /// copy's size.
    fn publish(&self) -> anyhow::Result<u64> {
        let linked = std::fs::hard_link(&self.partial, &self.path);
        match linked {
            Ok(()) => {
                let _ = std::fs::remove_file(&self.partial);
            }
            Err(error) if error.kind() == std::io::ErrorKind::AlreadyExists => {
                self.discard_partial();
                bail!(
                    "--to {}: the file appeared while the backup ran; nothing was overwritten",
                    self.path.display()
                );
            }
            // A file system without hard links: rename, after checking the name once more.
            Err(_) => {
                if self.path.symlink_metadata().is_ok() {
                    self.discard_partial();
                    bail!(
                        "--to {}: the file appeared while the backup ran; nothing was overwritten",
                        self.path.display()
                    );
                }
                std::fs::rename(&self.partial, &self.path).with_context(|| {
                    format!("could not move the copy to {}", self.path.display())
                })?;
            }
        }
        std::fs::File::open(&self.directory)
            .and_then(|directory| directory.sync_all())
            .with_context(|| {
                format!("could not sync the directory {}", self.directory.display())
            })?;
        Ok(std::fs::metadata(&self.path)
            .with_context(|| format!("could not read {}", self.path.display()))?
            .len())
    }

    fn discard_partial(&self) {
        let _ = std::fs::remove_file(&self.partial);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn args(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| (*s).to_owned()).collect()
    }

    #[test]
    fn parses_the_target_and_passes_configuration_flags_on() {
        let (options, flags) = BackupOptions::parse(&args(&[
            "--to",
            "/tmp/b.db",
            "--database=sqlite://x.db",
            "--config",
            "c.toml",
        ]))
        .unwrap();
        assert_eq!(options.to, PathBuf::from("/tmp/b.db"));
        assert_eq!(
            flags,
            args(&["--database", "sqlite://x.db", "--config", "c.toml"])
        );
    }

    #[test]
    fn refuses_missing_target_unknown_options_and_empty_values() {
        let error = BackupOptions::parse(&args(&[])).unwrap_err().to_string();
        assert!(error.contains("--to PATH is required"), "{error}");
        let error = BackupOptions::parse(&args(&["--to", "b.db", "--force"]))
            .unwrap_err()
            .to_string();
        assert!(error.contains("unknown option \"--force\""), "{error}");
        let error = BackupOptions::parse(&args(&["--to"]))
            .unwrap_err()
            .to_string();
        assert!(error.contains("--to needs a value"), "{error}");
        let error = BackupOptions::parse(&args(&["--to="]))
            .unwrap_err()
            .to_string();
        assert!(error.contains("--to needs a value"), "{error}");
    }
}
