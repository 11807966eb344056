//! `sqlx::migrate!` embeds the migration folders at compile time, so the crate must be rebuilt when
//! a migration file is added or changed; this build script tells Cargo to watch both folders.

fn main() {
    println!("cargo:rerun-if-changed=../../migrations/sqlite");
    println!("cargo:rerun-if-changed=../../migrations/postgres");
}
