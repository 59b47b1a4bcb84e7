//! SIGINT and SIGTERM end a run without leaving temporary files in the output folder.
//!
//! The signals are blocked in every thread (the mask is set before rayon or any other
//! thread starts, and threads inherit it) and a dedicated thread waits for them with
//! `sigwait(3)`. It then runs ordinary code, which a signal handler may not:
//! [`crate::io::abandon_temporaries`] removes this process's temporary files (a commit in
//! progress finishes its renames first, so the folder holds the old set or the new one),
//! and the process exits with the shell's convention 128 + signal number: 130 for SIGINT,
//! 143 for SIGTERM.

/// Install the handling described in the module documentation. Call once, before any
/// other thread is started.
#[cfg(unix)]
pub(crate) fn install() {
    // SAFETY: plain libc calls on a sigset_t owned by this function.
    let set = unsafe {
        let mut set: libc::sigset_t = std::mem::zeroed();
        libc::sigemptyset(&mut set);
        libc::sigaddset(&mut set, libc::SIGINT);
        libc::sigaddset(&mut set, libc::SIGTERM);
        if libc::pthread_sigmask(libc::SIG_BLOCK, &set, std::ptr::null_mut()) != 0 {
            return;
        }
        set
    };
    let spawned = std::thread::Builder::new()
        .name("signals".to_string())
        .spawn(move || loop {
            let mut signal: libc::c_int = 0;
            // SAFETY: `set` is a valid signal set; `signal` a valid out pointer.
            if unsafe { libc::sigwait(&set, &mut signal) } == 0 {
                crate::io::abandon_temporaries();
                std::process::exit(128 + signal);
            }
        });
    if spawned.is_err() {
        // Without the waiting thread the signals would be ignored: restore the default.
        // SAFETY: as above.
        unsafe {
            libc::pthread_sigmask(libc::SIG_UNBLOCK, &set, std::ptr::null_mut());
        }
    }
}

#[cfg(not(unix))]
pub(crate) fn install() {}
