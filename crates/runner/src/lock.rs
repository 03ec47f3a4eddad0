//! One writer per output: an exclusive lock object in the output store.
//!
//! The lock is `<out>/_lock/owner.json`, created with `PutMode::Create` (atomic
//! create-if-absent on local disks and on object stores). It names its owner (run id, host,
//! process id, command) and a lease expiry, renewed while the run works. A lock whose lease
//! has passed, or whose owner process is gone from this same host, may be taken over: the
//! taker first creates `<out>/_lock/takeover-<hash of the old lock>.json`, again with
//! `PutMode::Create`, so of two takers only one wins, then replaces the lock.

use crate::ledger::RunIdentity;
use crate::RunnerError;
use chrono::{DateTime, NaiveDate, Utc};
use datafusion::prelude::SessionContext;
use daymark_engine::build::{StagedCheck, StagedCheckFuture};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::object_store::{self, ObjectStoreExt, PutMode, PutPayload};
use daymark_store::Location;
use futures::TryStreamExt;
use serde::{Deserialize, Serialize};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

/// Folder of the lock inside the output.
pub const LOCK_DIR: &str = "_lock";

/// What the lock object holds.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct LockInfo {
    /// Run id of the holder.
    pub owner: String,
    /// Host of the holder.
    pub host: String,
    /// Process id of the holder.
    pub pid: u32,
    /// What the holder is doing (`run`, `watch`, `build`).
    pub command: String,
    /// When it took the lock (RFC 3339).
    pub started: String,
    /// When the lease ends unless renewed (RFC 3339).
    pub expires: String,
}

impl LockInfo {
    fn expiry(&self) -> Option<DateTime<Utc>> {
        DateTime::parse_from_rfc3339(&self.expires)
            .ok()
            .map(|t| t.with_timezone(&Utc))
    }

    /// One line for people: who holds it and until when.
    pub fn describe(&self) -> String {
        format!(
            "`daymark {}` (run {}, process {} on {}, since {}, lease until {})",
            self.command, self.owner, self.pid, self.host, self.started, self.expires
        )
    }
}

/// The outcome of trying to take the lock.
pub enum Acquire {
    /// The lock is ours; the text says so when an expired lock was taken over.
    Acquired(Box<LockGuard>, Option<String>),
    /// Another run holds it.
    Held(LockInfo),
}

/// A held lock: renewed in the background until released.
pub struct LockGuard {
    out: Location,
    info: LockInfo,
    lost: Arc<AtomicBool>,
    /// When the lease ends as last written by this run (taken, or renewed since).
    lease_end: Arc<std::sync::Mutex<DateTime<Utc>>>,
    renewer: tokio::task::JoinHandle<()>,
}

fn lock_path(out: &Location) -> StorePath {
    daymark_engine::build::child(&out.prefix, &[LOCK_DIR, "owner.json"])
}

fn store_err(path: &StorePath, e: impl std::fmt::Display) -> RunnerError {
    RunnerError::Store {
        path: path.to_string(),
        reason: e.to_string(),
    }
}

/// This machine's host name.
pub fn host_name() -> String {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is valid for its whole length; gethostname writes at most that many
    // bytes and the result is read only up to the first NUL.
    let rc = unsafe { libc::gethostname(buf.as_mut_ptr() as *mut libc::c_char, buf.len()) };
    if rc == 0 {
        let end = buf.iter().position(|b| *b == 0).unwrap_or(buf.len());
        let name = String::from_utf8_lossy(&buf[..end]).to_string();
        if !name.is_empty() {
            return name;
        }
    }
    "unknown-host".into()
}

/// Whether process `pid` exists on this host.
fn process_alive(pid: u32) -> bool {
    if pid == 0 || pid > i32::MAX as u32 {
        return false;
    }
    // SAFETY: signal 0 only checks that the process exists and may be signalled.
    let rc = unsafe { libc::kill(pid as libc::pid_t, 0) };
    rc == 0 || std::io::Error::last_os_error().raw_os_error() == Some(libc::EPERM)
}

fn fresh_info(run: &RunIdentity, command: &str, lease: Duration) -> LockInfo {
    let now = Utc::now();
    LockInfo {
        owner: run.run_id.clone(),
        host: run.host.clone(),
        pid: run.pid,
        command: command.into(),
        started: now.to_rfc3339(),
        expires: (now + chrono::Duration::from_std(lease).unwrap_or(chrono::Duration::MAX))
            .to_rfc3339(),
    }
}

/// Reads the lock: `None` when there is none; the raw bytes for the takeover claim.
pub async fn read(out: &Location) -> Result<Option<(LockInfo, Vec<u8>)>, RunnerError> {
    let path = lock_path(out);
    match out.store.get(&path).await {
        Ok(r) => {
            let bytes = r.bytes().await.map_err(|e| store_err(&path, e))?;
            let info: LockInfo = serde_json::from_slice(&bytes)
                .map_err(|e| store_err(&path, format!("not a daymark lock: {e}")))?;
            Ok(Some((info, bytes.to_vec())))
        }
        Err(object_store::Error::NotFound { .. }) => Ok(None),
        Err(e) => Err(store_err(&path, e)),
    }
}

/// Why a held lock may be taken over, if it may.
fn takeover_reason(info: &LockInfo, me: &RunIdentity) -> Option<String> {
    if info.expiry().is_none_or(|t| t < Utc::now()) {
        return Some(format!("its lease ended at {}", info.expires));
    }
    if info.host == me.host && (info.pid == me.pid || !process_alive(info.pid)) {
        return Some(format!(
            "its process {} on {} is no longer running",
            info.pid, info.host
        ));
    }
    None
}

/// Tries once to take the lock for `command`, with a lease of `lease`.
pub async fn acquire(
    out: &Location,
    run: &RunIdentity,
    command: &str,
    lease: Duration,
) -> Result<Acquire, RunnerError> {
    let path = lock_path(out);
    for _ in 0..5 {
        let info = fresh_info(run, command, lease);
        let body = serde_json::to_vec_pretty(&info).expect("a lock serialises");
        match out
            .store
            .put_opts(
                &path,
                PutPayload::from(body.clone()),
                PutMode::Create.into(),
            )
            .await
        {
            Ok(_) => {
                return Ok(Acquire::Acquired(
                    Box::new(LockGuard::start(out, info, lease)),
                    None,
                ))
            }
            Err(object_store::Error::AlreadyExists { .. }) => {}
            Err(e) => return Err(store_err(&path, e)),
        }
        let Some((held, raw)) = read(out).await? else {
            continue; // released in between: try again
        };
        let Some(reason) = takeover_reason(&held, run) else {
            return Ok(Acquire::Held(held));
        };
        let claim = daymark_engine::build::child(
            &out.prefix,
            &[
                LOCK_DIR,
                &format!(
                    "takeover-{}.json",
                    &daymark_spec::hash::hash_value(&serde_json::json!(String::from_utf8_lossy(
                        &raw
                    )))[..16]
                ),
            ],
        );
        match out
            .store
            .put_opts(
                &claim,
                PutPayload::from(body.clone()),
                PutMode::Create.into(),
            )
            .await
        {
            Ok(_) => {}
            Err(object_store::Error::AlreadyExists { .. }) => {
                // Another run claimed this lock first. A claimant killed between its claim
                // and its write of the lock leaves the claim behind: the claim is a lock
                // on the takeover and ends by the same rule, then the takeover is retried.
                let stale = match out.store.get(&claim).await {
                    Ok(r) => r
                        .bytes()
                        .await
                        .ok()
                        .and_then(|b| serde_json::from_slice::<LockInfo>(&b).ok())
                        .is_some_and(|c| takeover_reason(&c, run).is_some()),
                    Err(_) => false,
                };
                if stale {
                    let _ = out.store.delete(&claim).await;
                    continue;
                }
                return Ok(Acquire::Held(held));
            }
            Err(e) => return Err(store_err(&claim, e)),
        }
        out.store
            .put(&path, PutPayload::from(body))
            .await
            .map_err(|e| store_err(&path, e))?;
        let message = format!("took over the lock of {}: {reason}", held.describe());
        return Ok(Acquire::Acquired(
            Box::new(LockGuard::start(out, info, lease)),
            Some(message),
        ));
    }
    match read(out).await? {
        Some((held, _)) => Ok(Acquire::Held(held)),
        None => Err(store_err(&path, "the lock kept changing hands")),
    }
}

impl LockGuard {
    fn start(out: &Location, info: LockInfo, lease: Duration) -> LockGuard {
        let lost = Arc::new(AtomicBool::new(false));
        let lease_end = Arc::new(std::sync::Mutex::new(
            info.expiry().unwrap_or_else(Utc::now),
        ));
        let renewer = {
            let out = out.clone();
            let mut info = info.clone();
            let lost = lost.clone();
            let lease_end = lease_end.clone();
            tokio::spawn(async move {
                let every = (lease / 3).max(Duration::from_millis(200));
                loop {
                    tokio::time::sleep(every).await;
                    match read(&out).await {
                        Ok(Some((held, _))) if held.owner == info.owner => {}
                        Ok(_) => {
                            lost.store(true, Ordering::SeqCst);
                            return;
                        }
                        Err(_) => continue, // a passing store error: try again next time
                    }
                    let end = Utc::now()
                        + chrono::Duration::from_std(lease).unwrap_or(chrono::Duration::MAX);
                    info.expires = end.to_rfc3339();
                    let body = serde_json::to_vec_pretty(&info).expect("a lock serialises");
                    let renewed = out
                        .store
                        .put(&lock_path(&out), PutPayload::from(body))
                        .await;
                    if renewed.is_ok() {
                        if let Ok(mut e) = lease_end.lock() {
                            *e = end;
                        }
                    }
                }
            })
        };
        LockGuard {
            out: out.clone(),
            info,
            lost,
            lease_end,
            renewer,
        }
    }

    /// What the lock says about us.
    pub fn info(&self) -> &LockInfo {
        &self.info
    }

    /// True once another run has taken the lock from us (our lease ran out unrenewed).
    pub fn lost(&self) -> bool {
        self.lost.load(Ordering::SeqCst)
    }

    /// Whether the lock is still ours to publish under: not taken by another run, and its
    /// lease (as this run last wrote it) not ended. A lease can end unrenewed while the
    /// renewing task waits behind a busy machine; another run may then take the lock at any
    /// moment, so a run must not publish again until a renewal has gone through. Err says
    /// why, for people.
    pub fn held(&self) -> Result<(), String> {
        if self.lost() {
            return Err(format!(
                "the output lock was taken over by another run (this run: {})",
                self.info.owner
            ));
        }
        let end = self
            .lease_end
            .lock()
            .map(|e| *e)
            .unwrap_or_else(|_| Utc::now());
        if Utc::now() >= end {
            return Err(format!(
                "this run's lease on the output lock ended at {} without being renewed",
                end.to_rfc3339()
            ));
        }
        Ok(())
    }

    /// [`LockGuard::held`] as a [`RunnerError::LockLost`].
    pub fn ensure_held(&self) -> Result<(), RunnerError> {
        self.held()
            .map_err(|why| RunnerError::LockLost(format!("{why}; it was {}", self.info.describe())))
    }

    /// Stops renewing and removes the lock (and finished takeover claims) if still ours.
    pub async fn release(self) -> Result<(), RunnerError> {
        self.renewer.abort();
        let path = lock_path(&self.out);
        if let Some((held, _)) = read(&self.out).await? {
            if held.owner != self.info.owner {
                return Ok(());
            }
        }
        let dir = daymark_engine::build::child(&self.out.prefix, &[LOCK_DIR]);
        let claims: Vec<_> = self
            .out
            .store
            .list(Some(&dir))
            .try_collect()
            .await
            .unwrap_or_default();
        for m in claims {
            if m.location
                .filename()
                .is_some_and(|n| n.starts_with("takeover-"))
            {
                let _ = self.out.store.delete(&m.location).await;
            }
        }
        match self.out.store.delete(&path).await {
            Ok(()) | Err(object_store::Error::NotFound { .. }) => Ok(()),
            Err(e) => Err(store_err(&path, e)),
        }
    }
}

/// The checks run on each staged snapshot before it is published, after a check that the
/// lock is still ours ([`LockGuard::held`]): a run that lost its lock publishes nothing more
/// (the staged file is deleted and the build stops with the reason).
pub struct LeaseCheck<'a> {
    /// The lock the run holds.
    pub guard: &'a LockGuard,
    /// The checks to run next (`DailyChecks`), if any.
    pub then: Option<&'a dyn StagedCheck>,
}

impl StagedCheck for LeaseCheck<'_> {
    fn check<'a>(
        &'a self,
        ctx: &'a SessionContext,
        out: &'a Location,
        staged: &'a StorePath,
        day: NaiveDate,
        rows: u64,
    ) -> StagedCheckFuture<'a> {
        Box::pin(async move {
            self.guard.held()?;
            match self.then {
                Some(c) => c.check(ctx, out, staged, day, rows).await,
                None => Ok((Vec::new(), Vec::new())),
            }
        })
    }
}

impl Drop for LockGuard {
    fn drop(&mut self) {
        self.renewer.abort();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn run_as(pid: u32, host: &str) -> RunIdentity {
        RunIdentity {
            run_id: format!("test-{pid}"),
            host: host.into(),
            pid,
            started: Utc::now(),
        }
    }

    #[tokio::test]
    async fn one_holder_then_takeover_after_the_lease() {
        let dir = tempfile::tempdir().unwrap();
        let out = daymark_store::resolve(dir.path().to_str().unwrap(), None).unwrap();
        let me = RunIdentity::current();
        let Acquire::Acquired(first, None) = acquire(&out, &me, "run", Duration::from_secs(60))
            .await
            .unwrap()
        else {
            panic!("a free lock is taken");
        };
        // Another live process on another host: held.
        let other = run_as(1, "elsewhere");
        match acquire(&out, &other, "run", Duration::from_secs(60))
            .await
            .unwrap()
        {
            Acquire::Held(info) => assert_eq!(info.owner, me.run_id),
            Acquire::Acquired(..) => panic!("two holders"),
        }
        first.release().await.unwrap();
        assert!(read(&out).await.unwrap().is_none());

        // A lock whose lease has passed is taken over, and the run says so.
        let old = run_as(1, "elsewhere");
        let Acquire::Acquired(g, _) = acquire(&out, &old, "run", Duration::from_millis(1))
            .await
            .unwrap()
        else {
            panic!("free");
        };
        std::mem::forget(g); // as if the holder died: no release, no renewal
        tokio::time::sleep(Duration::from_millis(20)).await;
        let Acquire::Acquired(g, Some(msg)) = acquire(&out, &me, "run", Duration::from_secs(60))
            .await
            .unwrap()
        else {
            panic!("an expired lock is taken over");
        };
        assert!(msg.contains("lease ended"), "{msg}");
        // The lock now names the run that took it over.
        assert_eq!(read(&out).await.unwrap().unwrap().0.owner, me.run_id);
        g.release().await.unwrap();
    }

    /// A run may publish only while the lock is its own: not after its lease ended
    /// unrenewed, nor after another run took the lock over; the check before each publish
    /// ([`LeaseCheck`]) refuses with the reason.
    #[tokio::test]
    async fn no_publishing_once_the_lease_has_ended_or_the_lock_was_taken() {
        let dir = tempfile::tempdir().unwrap();
        let out = daymark_store::resolve(dir.path().to_str().unwrap(), None).unwrap();
        let ctx = SessionContext::new();
        let staged = daymark_engine::build::child(&out.prefix, &["staged.parquet"]);
        let day = NaiveDate::from_ymd_opt(2026, 1, 5).unwrap();
        let me = RunIdentity::current();
        let Acquire::Acquired(g, None) = acquire(&out, &me, "build", Duration::from_secs(60))
            .await
            .unwrap()
        else {
            panic!("a free lock is taken");
        };
        assert_eq!(g.held(), Ok(()));
        let check = LeaseCheck {
            guard: &g,
            then: None,
        };
        assert_eq!(
            check.check(&ctx, &out, &staged, day, 0).await,
            Ok((vec![], vec![]))
        );
        g.release().await.unwrap();

        // A lease of 1 ms, not yet renewed (the first renewal comes after 200 ms).
        let Acquire::Acquired(slow, _) = acquire(&out, &me, "build", Duration::from_millis(1))
            .await
            .unwrap()
        else {
            panic!("free");
        };
        tokio::time::sleep(Duration::from_millis(20)).await;
        let why = LeaseCheck {
            guard: &slow,
            then: None,
        }
        .check(&ctx, &out, &staged, day, 0)
        .await
        .unwrap_err();
        assert!(why.contains("without being renewed"), "{why}");
        // Another run takes the expired lock over: the first run's guard says so once its
        // renewing task has looked (and, before that, that its lease ended).
        let other = run_as(1, "elsewhere");
        let Acquire::Acquired(taker, Some(_)) =
            acquire(&out, &other, "run", Duration::from_secs(60))
                .await
                .unwrap()
        else {
            panic!("an expired lock is taken over");
        };
        assert!(slow.held().is_err());
        tokio::time::sleep(Duration::from_millis(400)).await;
        let err = slow.ensure_held().unwrap_err().to_string();
        assert!(err.contains("taken over by another run"), "{err}");
        assert!(err.contains("stopped before publishing more"), "{err}");
        drop(slow);
        taker.release().await.unwrap();
    }

    #[tokio::test]
    async fn a_claim_left_by_a_killed_claimant_does_not_block_the_takeover() {
        let dir = tempfile::tempdir().unwrap();
        let out = daymark_store::resolve(dir.path().to_str().unwrap(), None).unwrap();
        let me = RunIdentity::current();
        // A holder whose lease has passed, and a claim on its takeover by a run whose
        // lease has passed too (killed after its claim, before it wrote the lock).
        let Acquire::Acquired(g, _) = acquire(
            &out,
            &run_as(1, "elsewhere"),
            "run",
            Duration::from_millis(1),
        )
        .await
        .unwrap() else {
            panic!("free");
        };
        std::mem::forget(g);
        let (_, raw) = read(&out).await.unwrap().unwrap();
        let claim = daymark_engine::build::child(
            &out.prefix,
            &[
                LOCK_DIR,
                &format!(
                    "takeover-{}.json",
                    &daymark_spec::hash::hash_value(&serde_json::json!(String::from_utf8_lossy(
                        &raw
                    )))[..16]
                ),
            ],
        );
        let claimant = fresh_info(&run_as(2, "elsewhere"), "run", Duration::from_millis(1));
        out.store
            .put(
                &claim,
                PutPayload::from(serde_json::to_vec(&claimant).unwrap()),
            )
            .await
            .unwrap();
        tokio::time::sleep(Duration::from_millis(20)).await;
        let Acquire::Acquired(g, Some(msg)) = acquire(&out, &me, "run", Duration::from_secs(60))
            .await
            .unwrap()
        else {
            panic!("a stale claim blocked the takeover");
        };
        assert!(msg.contains("lease ended"), "{msg}");
        assert_eq!(read(&out).await.unwrap().unwrap().0.owner, me.run_id);
        g.release().await.unwrap();
    }
}
