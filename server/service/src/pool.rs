//! A pool of CPU worker threads for decoding, preprocessing and inference, off the async runtime.
//!
//! Jobs wait in one bounded FIFO queue. Each session has at most one frame in the pool at a time, so the
//! queue serves sessions in turn: one busy session cannot starve another.

use std::sync::{Arc, Mutex};

use tokio::sync::{mpsc, oneshot};

type Job = Box<dyn FnOnce() + Send + 'static>;

/// The worker pool.
#[derive(Debug, Clone)]
pub struct WorkerPool {
    queue: mpsc::Sender<Job>,
    workers: usize,
}

/// The pool has stopped.
#[derive(Debug, Clone, Copy, thiserror::Error)]
#[error("the worker pool has stopped, or the job failed")]
pub struct PoolStopped;

impl WorkerPool {
    /// Starts `workers` threads with a queue of `capacity` jobs.
    pub fn start(workers: usize, capacity: usize) -> std::io::Result<Self> {
        let workers = workers.max(1);
        let (queue, receiver) = mpsc::channel::<Job>(capacity.max(1));
        let receiver = Arc::new(Mutex::new(receiver));
        for i in 0..workers {
            let receiver = receiver.clone();
            std::thread::Builder::new()
                .name(format!("framewise-worker-{i}"))
                .spawn(move || {
                    loop {
                        let job = match receiver.lock() {
                            Ok(mut r) => r.blocking_recv(),
                            Err(_) => None,
                        };
                        match job {
                            // A panicking job must not take the worker with it: its session gets an
                            // error answer (the result channel closes) and the worker goes on.
                            Some(job) => {
                                let run = std::panic::AssertUnwindSafe(job);
                                if std::panic::catch_unwind(run).is_err() {
                                    tracing::error!(
                                        "a worker job panicked; its frame got an error answer"
                                    );
                                }
                            }
                            None => break,
                        }
                    }
                })?;
        }
        Ok(Self { queue, workers })
    }

    /// Number of worker threads.
    pub fn workers(&self) -> usize {
        self.workers
    }

    /// Runs `work` on a worker and waits for its result without blocking the async runtime.
    pub async fn run<T: Send + 'static>(
        &self,
        work: impl FnOnce() -> T + Send + 'static,
    ) -> Result<T, PoolStopped> {
        let (tx, rx) = oneshot::channel();
        let job: Job = Box::new(move || {
            // The receiver may be gone (the session ended); the result is then dropped.
            let _ = tx.send(work());
        });
        self.queue.send(job).await.map_err(|_| PoolStopped)?;
        rx.await.map_err(|_| PoolStopped)
    }
}
