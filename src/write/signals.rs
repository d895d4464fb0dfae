//! Interruption: SIGINT, SIGTERM and SIGHUP end posgrid within a second in every phase, and
//! no temporary output survives them.
//!
//! Every temporary file or directory is registered here while it exists. A watcher thread
//! (started only by [`install_interrupt_handler`], so a library caller keeps its own signal
//! handling) sets a flag on the first signal. With nothing registered it ends the process at
//! once; otherwise it gives the writing thread a short grace to notice the flag and clean up
//! itself, then removes whatever is still registered and ends the process. Registration,
//! removal and the final rename all hold one lock, so a rename never races the removal.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, MutexGuard, OnceLock};
use std::time::Duration;

use crate::error::EXIT_INTERRUPTED;

/// How long the writing thread may take to notice an interruption and clean up by itself.
const GRACE: Duration = Duration::from_millis(500);

static INTERRUPTED: AtomicBool = AtomicBool::new(false);
/// Set once every output of the run is in place.
static COMMITTED: AtomicBool = AtomicBool::new(false);

/// Record that the outputs are in place: an interruption after this says so.
pub(crate) fn mark_committed() {
    COMMITTED.store(true, Ordering::SeqCst);
}
static INSTALLED: OnceLock<()> = OnceLock::new();
static TEMPORARIES: Mutex<Vec<Temporary>> = Mutex::new(Vec::new());

/// A registered temporary: where it is, and the output it stands for.
pub(crate) struct Temporary {
    pub path: PathBuf,
    pub output: PathBuf,
    pub is_dir: bool,
}

/// The registry of temporaries, locked. Held across creating a temporary, renaming it into
/// place and removing it, so the signal watcher sees either the temporary or the result.
pub(crate) fn temporaries() -> MutexGuard<'static, Vec<Temporary>> {
    TEMPORARIES
        .lock()
        .unwrap_or_else(|poisoned| poisoned.into_inner())
}

/// Forget a temporary that has been renamed or removed.
pub(crate) fn deregister(list: &mut Vec<Temporary>, path: &Path) {
    list.retain(|t| t.path != path);
}

/// Watch for SIGINT, SIGTERM and SIGHUP (a closed terminal) as described above, and ignore
/// SIGXFSZ so that a file-size limit becomes a write error (exit 5, temporaries removed)
/// instead of killing the process. Called once by the binary; harmless to call again. A
/// library caller that calls it hands these signals to posgrid: the first one ends the
/// process with exit status 130.
pub fn install_interrupt_handler() {
    INSTALLED.get_or_init(|| {
        // SAFETY: setting a signal's disposition to "ignore" has no handler to run.
        unsafe { libc::signal(libc::SIGXFSZ, libc::SIG_IGN) };
        let signals = [
            signal_hook::consts::SIGINT,
            signal_hook::consts::SIGTERM,
            signal_hook::consts::SIGHUP,
        ];
        match signal_hook::iterator::Signals::new(signals) {
            Ok(mut watched) => {
                let spawned = std::thread::Builder::new()
                    .name("posgrid-signals".into())
                    .spawn(move || {
                        if watched.forever().next().is_some() {
                            end_interrupted();
                        }
                    });
                if spawned.is_err() {
                    register_flag_only(&signals);
                }
            }
            Err(_) => register_flag_only(&signals),
        }
    });
}

/// Set by signal-hook's own handler when no watcher thread could be started.
static FLAG_ONLY: OnceLock<Arc<AtomicBool>> = OnceLock::new();

/// Without a watcher thread, at least let the writing loops see the flag.
fn register_flag_only(signals: &[i32]) {
    let flag = FLAG_ONLY.get_or_init(Default::default);
    for &signal in signals {
        // Registration fails only for forbidden signals; these are allowed.
        let _ = signal_hook::flag::register(signal, Arc::clone(flag));
    }
}

/// Whether SIGINT, SIGTERM or SIGHUP has arrived.
pub fn interrupted() -> bool {
    INTERRUPTED.load(Ordering::SeqCst) || FLAG_ONLY.get().is_some_and(|f| f.load(Ordering::SeqCst))
}

/// The watcher's side of an interruption: never returns.
fn end_interrupted() -> ! {
    INTERRUPTED.store(true, Ordering::SeqCst);
    {
        let list = temporaries();
        if list.is_empty() {
            exit_locked(list, None);
        }
    }
    std::thread::sleep(GRACE);
    let list = temporaries();
    for t in list.iter() {
        let _ = if t.is_dir {
            std::fs::remove_dir_all(&t.path)
        } else {
            std::fs::remove_file(&t.path)
        };
    }
    let output = list.first().map(|t| t.output.clone());
    exit_locked(list, output.as_deref());
}

fn exit_locked(_held: MutexGuard<'static, Vec<Temporary>>, output: Option<&Path>) -> ! {
    let committed = COMMITTED.load(Ordering::SeqCst);
    let message = match (output, committed) {
        (Some(p), true) => format!(
            "posgrid: {}: interrupted after the output was put in place; it is complete",
            p.display()
        ),
        (None, true) => {
            "posgrid: interrupted after the output was put in place; it is complete".into()
        }
        (Some(p), false) => format!(
            "posgrid: {}: interrupted; the output was not written and nothing was left behind",
            p.display()
        ),
        (None, false) => {
            "posgrid: interrupted; nothing was written and nothing was left behind".into()
        }
    };
    // A closed terminal (SIGHUP) makes this write fail; the exit status still tells.
    let _ = writeln!(std::io::stderr(), "{message}");
    std::process::exit(EXIT_INTERRUPTED);
}

/// Print `message` (if any) on stderr and end the process with `code`, holding the registry
/// lock so that the signal watcher cannot print or exit at the same moment. For the binary's
/// last step.
pub fn exit_process(code: i32, message: Option<&str>) -> ! {
    let _held = temporaries();
    if let Some(m) = message {
        let _ = writeln!(std::io::stderr(), "{m}");
    }
    let _ = std::io::stdout().flush();
    std::process::exit(code);
}
