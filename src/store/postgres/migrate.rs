//! The schema: versioned SQL files (`migrations/NNNN_name.sql`, compiled in), applied at
//! start in one transaction under an advisory lock, so replicas starting together migrate
//! once: the first takes the lock and applies what is missing; the others wait for it, then
//! find nothing left to do. `pollard_migrations` records each applied version.

use tokio_postgres::Client;

use super::{db, Fail};
use crate::store::StoreError;

/// Every migration, in order: (version, name, SQL). Versions start at 1 without gaps; a
/// released file never changes (a change is a new file).
pub const MIGRATIONS: &[(i32, &str, &str)] = &[
    (1, "init", include_str!("migrations/0001_init.sql")),
    (2, "run_leases", include_str!("migrations/0002_run_leases.sql")),
    (3, "unit_claims", include_str!("migrations/0003_unit_claims.sql")),
];

/// The advisory lock key of migrations ("pollard" in ASCII).
const LOCK: i64 = 0x706f_6c6c_6172_64;

/// Applies the migrations this database lacks; returns how many were applied. A database
/// migrated by a newer build (a version this build does not know) is refused.
pub async fn migrate(client: &mut Client) -> Result<usize, StoreError> {
    let run = async {
        let tx = client.transaction().await?;
        tx.execute("SELECT pg_advisory_xact_lock($1)", &[&LOCK]).await?;
        tx.batch_execute("CREATE TABLE IF NOT EXISTS pollard_migrations (version integer PRIMARY KEY, name text NOT NULL, applied_at timestamptz NOT NULL DEFAULT now())").await?;
        let applied: i32 = tx.query_one("SELECT coalesce(max(version), 0) FROM pollard_migrations", &[]).await?.get(0);
        let known = MIGRATIONS.last().map_or(0, |m| m.0);
        if applied > known {
            return Err(Fail::Store(StoreError::Corrupt(format!("the database's schema is at version {applied}, newer than this build knows ({known}): run a newer pollard"))));
        }
        let mut n = 0;
        for (version, name, sql) in MIGRATIONS.iter().filter(|m| m.0 > applied) {
            tx.batch_execute(sql).await.map_err(|e| Fail::Store(StoreError::Io(format!("schema migration {version:04}_{name}: {}", db(e)))))?;
            tx.execute("INSERT INTO pollard_migrations (version, name) VALUES ($1, $2)", &[version, name]).await?;
            n += 1;
        }
        tx.commit().await?;
        Ok(n)
    };
    run.await.map_err(Fail::into_store)
}
