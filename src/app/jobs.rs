//! Work off the UI thread: a job runs in a thread, reports through a [`Progress`], and hands its
//! result back once; the UI polls it every frame.

use ductline::progress::Progress;
use std::sync::mpsc;

pub struct Job<T> {
    pub label: String,
    pub progress: Progress,
    rx: mpsc::Receiver<T>,
}

impl<T: Send + 'static> Job<T> {
    pub fn spawn(label: impl Into<String>, f: impl FnOnce(&Progress) -> T + Send + 'static) -> Self {
        let (tx, rx) = mpsc::channel();
        let progress = Progress::new();
        let p = progress.clone();
        std::thread::spawn(move || {
            let _ = tx.send(f(&p));
        });
        Job { label: label.into(), progress, rx }
    }

    /// The result once the job has finished.
    pub fn poll(&self) -> Option<T> {
        self.rx.try_recv().ok()
    }
}

/// A file dialog run on its own thread (never on the UI thread); None when cancelled or when no
/// dialog service exists.
pub fn dialog(f: impl FnOnce() -> Option<std::path::PathBuf> + Send + 'static) -> mpsc::Receiver<Option<std::path::PathBuf>> {
    let (tx, rx) = mpsc::channel();
    std::thread::spawn(move || {
        let _ = tx.send(f());
    });
    rx
}
