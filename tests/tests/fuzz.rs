//! Bounded fuzzing of every input parser: frames in every pixel format, PNG/JPEG, the model manifest, the
//! session opening, Y4M and recording CSV. Seeded, so a failure replays; corpora under tests/corpus/.
//!
//! Each target runs every file of its seed corpus (`tests/corpus/<target>/`) as it is, then mutates them
//! (bit flips, truncation, splices, and edits that know the format: PNG chunks, JPEG segments, Y4M header
//! tokens, TOML values, protobuf fields). Coverage-free and bounded. The oracle: no panic, no hang, memory
//! bounded by the configured limits, and a clear error for every refusal. A failing input is written to
//! `target/fuzz-crashes/<target>/` with its seed, and the test fails.
//!
//! Environment:
//! - `FRAMEWISE_FUZZ_ITERS=<n>`: mutated inputs per target (the default keeps all targets near 30 s in CI);
//! - `FRAMEWISE_FUZZ_SECONDS=<s>`: a time budget per target instead (with both set, whichever ends first);
//! - `FRAMEWISE_FUZZ_SEED=<n>`: the base seed (default fixed, so CI runs the same inputs every time);
//! - `FRAMEWISE_FUZZ_REPLAY=<hex seed>`: runs only the input of that seed (as printed by a failure).
//!
//! Also here: broken model packages (truncated and bit-flipped `.onnx`, a registry holding one good and one
//! broken package), malformed protobuf and gRPC framing over the wire against an in-process server, and a
//! check that a bearer token and frame bytes never reach the server's logs.
//!
//! `cargo test --release -p framewise-tests --test fuzz -- --ignored write_seed_corpora` rewrites the seed
//! corpora (synthetic content only).

use std::alloc::{GlobalAlloc, Layout, System};
use std::cell::{Cell, RefCell};
use std::collections::{BTreeMap, BTreeSet};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex, Once};
use std::time::{Duration, Instant};

use framewise_cli::recording::Recording;
use framewise_engine::frame::{self, DEFAULT_FRAME_LIMITS, DecodeScratch, FrameLimits, RgbImage};
use framewise_engine::manifest::ManifestError;
use framewise_engine::pipeline::{self, FrameSpec, Smoother};
use framewise_engine::quality::QualityMeasures;
use framewise_engine::{
    Decision, FrameRef, Manifest, Model, ModelError, ModelPackage, PixelFormat, Region, YuvMatrix,
    YuvRange, YuvSpec,
};
use framewise_models_demo::package::{DEMO_MANIFEST, DEMO_ONNX};
use framewise_proto::v1 as pb;
use framewise_server::convert;
use framewise_tests::{Rng, demo_model, workspace_root};
use prost::Message;

// ---------------------------------------------------------------------------------------------------------
// Harness: budget, seeds, memory meter, watchdog, crash store.
// ---------------------------------------------------------------------------------------------------------

/// One input taking longer than this fails the target (a hang detector, generous for shared CI machines).
const HANG_LIMIT: Duration = Duration::from_secs(2);
/// An input still running after this is a real hang: the watchdog records it and aborts the process.
const WATCHDOG_ABORT: Duration = Duration::from_secs(30);
/// A target stops after this many failures (each is saved).
const MAX_FAILURES: usize = 5;
/// Largest input a mutation may grow to.
const MAX_INPUT: usize = 1 << 20;
/// Default base seed.
const DEFAULT_SEED: u64 = 0x00F2_A3E5_0001;

/// Counts allocations per thread so that a target can check how much one input made the code allocate.
struct Metered;

#[global_allocator]
static METERED: Metered = Metered;

thread_local! {
    static NET: Cell<isize> = const { Cell::new(0) };
    static PEAK: Cell<isize> = const { Cell::new(0) };
    static LARGEST: Cell<usize> = const { Cell::new(0) };
}

fn note_alloc(size: usize) {
    let _ = NET.try_with(|net| {
        let now = net.get().wrapping_add(size as isize);
        net.set(now);
        let _ = PEAK.try_with(|peak| {
            if now > peak.get() {
                peak.set(now);
            }
        });
    });
    let _ = LARGEST.try_with(|largest| {
        if size > largest.get() {
            largest.set(size);
        }
    });
}

fn note_free(size: usize) {
    let _ = NET.try_with(|net| net.set(net.get().wrapping_sub(size as isize)));
}

// SAFETY: every call goes to the system allocator unchanged; the bookkeeping only touches thread-local
// cells with constant initialisers, which never allocate.
unsafe impl GlobalAlloc for Metered {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        // SAFETY: the caller upholds `GlobalAlloc::alloc`'s contract, which is passed on as it is.
        let p = unsafe { System.alloc(layout) };
        if !p.is_null() {
            note_alloc(layout.size());
        }
        p
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        // SAFETY: as for `alloc`.
        let p = unsafe { System.alloc_zeroed(layout) };
        if !p.is_null() {
            note_alloc(layout.size());
        }
        p
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        // SAFETY: `ptr` came from this allocator, which is the system's.
        unsafe { System.dealloc(ptr, layout) };
        note_free(layout.size());
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        // SAFETY: as for `dealloc`, and the caller upholds `realloc`'s contract.
        let p = unsafe { System.realloc(ptr, layout, new_size) };
        if !p.is_null() {
            note_free(layout.size());
            note_alloc(new_size);
        }
        p
    }
}

/// What one call allocated on this thread: its largest single allocation and its peak growth.
#[derive(Debug, Clone, Copy, Default)]
struct Usage {
    largest: usize,
    peak: usize,
}

fn metered<T>(f: impl FnOnce() -> T) -> (T, Usage) {
    let base = NET.with(Cell::get);
    PEAK.with(|p| p.set(base));
    LARGEST.with(|l| l.set(0));
    let out = f();
    let usage = Usage {
        largest: LARGEST.with(Cell::get),
        peak: (PEAK.with(Cell::get) - base).max(0) as usize,
    };
    (out, usage)
}

/// What running one input gave.
enum Verdict {
    /// Accepted (the kind says how).
    Accepted(String),
    /// Refused with a clear error of this kind.
    Refused(String),
    /// The oracle failed: a wrong answer, too much memory, an unclear error.
    Violation(String),
}

fn env_value<T: std::str::FromStr>(name: &str) -> Option<T> {
    let text = std::env::var(name).ok()?;
    match text.trim().parse() {
        Ok(v) => Some(v),
        Err(_) => panic!("{name}={text} is not a valid number"),
    }
}

/// How long a target runs.
struct Budget {
    iterations: Option<u64>,
    seconds: Option<f64>,
    seed: u64,
    replay: Option<u64>,
}

impl Budget {
    fn from_env(default_iterations: u64) -> Self {
        let iterations = env_value::<u64>("FRAMEWISE_FUZZ_ITERS");
        let seconds = env_value::<f64>("FRAMEWISE_FUZZ_SECONDS");
        let replay = std::env::var("FRAMEWISE_FUZZ_REPLAY").ok().map(|s| {
            u64::from_str_radix(s.trim().trim_start_matches("0x"), 16)
                .unwrap_or_else(|_| panic!("FRAMEWISE_FUZZ_REPLAY={s} is not a hex seed"))
        });
        let (iterations, seconds) = match (iterations, seconds) {
            (None, None) => (Some(default_iterations), None),
            other => other,
        };
        Self {
            iterations,
            seconds,
            seed: env_value::<u64>("FRAMEWISE_FUZZ_SEED").unwrap_or(DEFAULT_SEED),
            replay,
        }
    }

    fn more(&self, done: u64, started: Instant) -> bool {
        self.iterations.is_none_or(|n| done < n)
            && self
                .seconds
                .is_none_or(|s| started.elapsed().as_secs_f64() < s)
    }

    /// The seed of mutated input `i` of `target`.
    fn seed_of(&self, target: &str, i: u64) -> u64 {
        let mut h = self.seed ^ 0xCBF2_9CE4_8422_2325;
        for b in target.bytes() {
            h = (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01B3);
        }
        Rng::new(h.wrapping_add(i)).next_u64()
    }
}

thread_local! {
    /// Set while a fuzz input runs on this thread.
    static IN_INPUT: Cell<bool> = const { Cell::new(false) };
    /// Where the last panic of an input happened, with its (unresolved) backtrace.
    static LAST_PANIC: RefCell<Option<(String, std::backtrace::Backtrace)>> = const { RefCell::new(None) };
    /// Panics during inputs by location, including those the product code contains itself.
    static PANICS: RefCell<BTreeMap<String, u64>> = const { RefCell::new(BTreeMap::new()) };
}

/// During a fuzz input, a panic is only recorded (its backtrace resolved later, and only if it escapes):
/// printing or resolving it there would cost time and memory that the input would be charged with.
fn install_panic_hook() {
    static HOOK: Once = Once::new();
    HOOK.call_once(|| {
        let previous = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            if !IN_INPUT.with(Cell::get) {
                previous(info);
                return;
            }
            // Locations in dependencies are named from the crate's folder on.
            let at = info
                .location()
                .map(|l| {
                    let file = l.file();
                    let file = file
                        .find("/registry/src/")
                        .and_then(|at| file[at + 14..].split_once('/'))
                        .map_or(file, |(_, rest)| rest);
                    format!("{file}:{}", l.line())
                })
                .unwrap_or_default();
            PANICS.with(|p| *p.borrow_mut().entry(at.clone()).or_default() += 1);
            let trace = std::backtrace::Backtrace::force_capture();
            LAST_PANIC.with(|p| *p.borrow_mut() = Some((at, trace)));
        }));
    });
}

/// Runs one input with the panic hook in recording mode; a panic that escapes is described by its message,
/// its location and the first frame in the workspace.
fn guarded<T>(f: impl FnOnce() -> T) -> Result<T, String> {
    install_panic_hook();
    IN_INPUT.with(|flag| flag.set(true));
    let outcome = catch_unwind(AssertUnwindSafe(f));
    IN_INPUT.with(|flag| flag.set(false));
    outcome.map_err(|payload| {
        let Some((at, trace)) = LAST_PANIC.with(|p| p.borrow_mut().take()) else {
            return format!("panic: {}", panic_text(&*payload));
        };
        // An escaped panic is not one the product contained.
        PANICS.with(|p| {
            if let Some(n) = p.borrow_mut().get_mut(&at) {
                *n -= 1;
            }
        });
        let trace = trace.to_string();
        let ours = trace
            .lines()
            .filter_map(|l| l.trim().strip_prefix("at "))
            .find(|l| !l.contains("/rustc/") && !l.contains("/.cargo/") && !l.contains("fuzz.rs"))
            .map_or(String::new(), |l| format!(" (from {l})"));
        format!("panic at {at}{ours}: {}", panic_text(&*payload))
    })
}

/// The panics the product code caught itself during this thread's inputs, by location, since the last call.
fn contained_panics() -> String {
    let found = PANICS.with(|p| std::mem::take(&mut *p.borrow_mut()));
    let list: Vec<String> = found
        .into_iter()
        .filter(|(_, n)| *n > 0)
        .map(|(at, n)| format!("{at} x{n}"))
        .collect();
    if list.is_empty() {
        "none".into()
    } else {
        list.join(", ")
    }
}

use framewise_engine::panic_text;

/// Aborts the process, after saying which input hung, when one input runs past [`WATCHDOG_ABORT`].
struct Watchdog {
    current: Arc<Mutex<Option<(Instant, String)>>>,
    done: Arc<AtomicBool>,
    thread: Option<std::thread::JoinHandle<()>>,
}

impl Watchdog {
    fn start(target: &'static str, dir: PathBuf) -> Self {
        let current: Arc<Mutex<Option<(Instant, String)>>> = Arc::new(Mutex::new(None));
        let done = Arc::new(AtomicBool::new(false));
        let thread = {
            let (current, done) = (current.clone(), done.clone());
            std::thread::spawn(move || {
                while !done.load(Ordering::Relaxed) {
                    std::thread::sleep(Duration::from_millis(100));
                    let hung = current.lock().ok().and_then(|c| {
                        c.as_ref()
                            .filter(|(t, _)| t.elapsed() > WATCHDOG_ABORT)
                            .map(|(_, what)| what.clone())
                    });
                    if let Some(what) = hung {
                        let note = format!(
                            "fuzz {target}: {what} ran for more than {} s: a hang; aborting",
                            WATCHDOG_ABORT.as_secs()
                        );
                        let _ = std::fs::create_dir_all(&dir);
                        let _ = std::fs::write(dir.join("hang.txt"), &note);
                        eprintln!("{note}");
                        std::process::abort();
                    }
                }
            })
        };
        Self {
            current,
            done,
            thread: Some(thread),
        }
    }

    fn begin(&self, what: String) {
        if let Ok(mut c) = self.current.lock() {
            *c = Some((Instant::now(), what));
        }
    }

    fn end(&self) {
        if let Ok(mut c) = self.current.lock() {
            *c = None;
        }
    }
}

impl Drop for Watchdog {
    fn drop(&mut self) {
        self.done.store(true, Ordering::Relaxed);
        if let Some(t) = self.thread.take() {
            let _ = t.join();
        }
    }
}

/// The figures of one target's run.
#[derive(Debug, Default)]
struct Summary {
    executions: u64,
    corpus: u64,
    kinds: BTreeMap<String, u64>,
    seconds: f64,
}

impl Summary {
    fn saw(&self, kind: &str) -> bool {
        self.kinds.keys().any(|k| k.contains(kind))
    }

    /// Checks that a full run reached each of `kinds` (not checked on a replay or a run of a few inputs).
    fn expect_reached(&self, target: &str, kinds: &[&str]) {
        if self.executions - self.corpus < 1_000 {
            return;
        }
        for kind in kinds {
            assert!(self.saw(kind), "the {target} fuzzer never reached {kind}");
        }
    }
}

/// Runs one target: the corpus as it is, then mutated inputs within the budget.
fn fuzz<I>(
    target: &'static str,
    default_iterations: u64,
    corpus: &[(String, I)],
    mut mutate: impl FnMut(&mut Rng, &[(String, I)]) -> I,
    mut execute: impl FnMut(&I) -> Verdict,
    save: impl Fn(&I) -> (String, Vec<u8>),
) -> Summary {
    assert!(!corpus.is_empty(), "the {target} corpus is empty");
    let _ = contained_panics();
    let budget = Budget::from_env(default_iterations);
    let crash_dir = workspace_root().join("target/fuzz-crashes").join(target);
    let watchdog = Watchdog::start(target, crash_dir.clone());
    let started = Instant::now();
    let mut summary = Summary::default();
    let mut failures: Vec<String> = Vec::new();
    let mut slowest = (Duration::ZERO, String::new());
    let mut run =
        |label: String, seed: Option<u64>, input: &I, summary: &mut Summary| -> Option<String> {
            watchdog.begin(label.clone());
            let t0 = Instant::now();
            let outcome = guarded(|| execute(input));
            let mut took = t0.elapsed();
            if took > HANG_LIMIT {
                // Inputs are deterministic: a slow one is run again, and only slow twice is a hang (a
                // shared machine can stall file writes for a moment).
                let t1 = Instant::now();
                let _ = guarded(|| execute(input));
                took = took.min(t1.elapsed());
            }
            watchdog.end();
            summary.executions += 1;
            if took > slowest.0 {
                slowest = (took, label.clone());
            }
            let mut problem = None;
            match outcome {
                Ok(Verdict::Accepted(kind)) | Ok(Verdict::Refused(kind)) => {
                    *summary.kinds.entry(kind).or_default() += 1;
                }
                Ok(Verdict::Violation(why)) => problem = Some(format!("oracle: {why}")),
                Err(panic) => problem = Some(panic),
            }
            if took > HANG_LIMIT {
                problem = Some(format!(
                    "took {:.2} s, more than the {} s limit per input",
                    took.as_secs_f64(),
                    HANG_LIMIT.as_secs()
                ));
            }
            if let Some(problem) = problem {
                let (name, bytes) = save(input);
                let stem = match seed {
                    Some(s) => format!("{s:016x}"),
                    None => "corpus".to_string(),
                };
                let path = crash_dir.join(format!("{stem}-{name}"));
                let replay = seed.map_or(String::new(), |s| {
                    format!("; replay with FRAMEWISE_FUZZ_REPLAY={s:016x}")
                });
                let note = format!("{target} {label}: {problem}{replay}");
                let _ = std::fs::create_dir_all(&crash_dir);
                let _ = std::fs::write(&path, &bytes);
                let _ = std::fs::write(path.with_extension("txt"), &note);
                return Some(format!("{note} (input saved to {})", path.display()));
            }
            None
        };
    if let Some(seed) = budget.replay {
        let input = mutate(&mut Rng::new(seed), corpus);
        failures.extend(run(
            format!("replay {seed:016x}"),
            Some(seed),
            &input,
            &mut summary,
        ));
    } else {
        for (name, input) in corpus {
            failures.extend(run(format!("corpus {name}"), None, input, &mut summary));
        }
        summary.corpus = summary.executions;
        let mut i = 0;
        while budget.more(i, started) && failures.len() < MAX_FAILURES {
            let seed = budget.seed_of(target, i);
            let input = mutate(&mut Rng::new(seed), corpus);
            failures.extend(run(format!("input {i}"), Some(seed), &input, &mut summary));
            i += 1;
        }
    }
    summary.seconds = started.elapsed().as_secs_f64();
    drop(watchdog);
    let kinds: Vec<String> = summary
        .kinds
        .iter()
        .map(|(k, n)| format!("{k} {n}"))
        .collect();
    eprintln!(
        "fuzz {target}: {} executions ({} corpus, {} mutated) in {:.1} s; slowest input {:.1} ms ({}); \
         {} distinct outcomes: {}",
        summary.executions,
        summary.corpus,
        summary.executions - summary.corpus,
        summary.seconds,
        slowest.0.as_secs_f64() * 1000.0,
        slowest.1,
        summary.kinds.len(),
        kinds.join(", ")
    );
    eprintln!(
        "fuzz {target}: panics caught inside framewise's own code: {}",
        contained_panics()
    );
    assert!(
        failures.is_empty(),
        "fuzz {target}: {} failing inputs:\n{}",
        failures.len(),
        failures.join("\n")
    );
    summary
}

// ---------------------------------------------------------------------------------------------------------
// Mutations shared by every target.
// ---------------------------------------------------------------------------------------------------------

const INTERESTING_U8: [u8; 10] = [0, 1, 2, 0x0A, 0x20, 0x7F, 0x80, 0xC3, 0xFE, 0xFF];
const INTERESTING_U32: [u32; 22] = [
    0,
    1,
    2,
    3,
    7,
    8,
    15,
    16,
    0x7F,
    0x80,
    0xFF,
    0x100,
    0x7FFF,
    0x8000,
    0xFFFF,
    0x1_0000,
    8192,
    8193,
    0x7FFF_FFFF,
    0x8000_0000,
    0xFFFF_FFFE,
    0xFFFF_FFFF,
];

fn pick<'a, T>(rng: &mut Rng, items: &'a [T]) -> &'a T {
    &items[rng.below(items.len() as u64) as usize]
}

fn index(rng: &mut Rng, len: usize) -> usize {
    rng.below(len as u64) as usize
}

/// Stacks 1, 2, 4 or 8 byte-level mutations; `donor` is spliced from, `dict` holds the format's tokens.
fn mutate_bytes(rng: &mut Rng, data: &mut Vec<u8>, donor: &[u8], dict: &[&[u8]]) {
    let rounds = 1 << rng.below(4);
    for _ in 0..rounds {
        mutate_once(rng, data, donor, dict);
    }
    data.truncate(MAX_INPUT);
}

fn mutate_once(rng: &mut Rng, data: &mut Vec<u8>, donor: &[u8], dict: &[&[u8]]) {
    let len = data.len();
    match rng.below(15) {
        0 if len > 0 => {
            let i = index(rng, len);
            data[i] ^= 1 << rng.below(8);
        }
        1 if len > 0 => {
            let i = index(rng, len);
            data[i] = rng.next_u64() as u8;
        }
        2 if len > 0 => {
            let i = index(rng, len);
            data[i] = *pick(rng, &INTERESTING_U8);
        }
        3 if len > 0 => {
            let i = index(rng, len);
            data[i] = data[i].wrapping_add(rng.below(33) as u8).wrapping_sub(16);
        }
        4 if len >= 2 => {
            let i = index(rng, len - 1);
            let v = *pick(rng, &INTERESTING_U32) as u16;
            let b = if rng.chance(0.5) {
                v.to_be_bytes()
            } else {
                v.to_le_bytes()
            };
            data[i..i + 2].copy_from_slice(&b);
        }
        5 if len >= 4 => {
            let i = index(rng, len - 3);
            let v = *pick(rng, &INTERESTING_U32);
            let b = if rng.chance(0.5) {
                v.to_be_bytes()
            } else {
                v.to_le_bytes()
            };
            data[i..i + 4].copy_from_slice(&b);
        }
        6 if len > 0 => {
            let start = index(rng, len);
            let n = 1 + index(rng, (len - start).min(64));
            data.drain(start..start + n);
        }
        7 => {
            let at = index(rng, len + 1);
            let bytes: Vec<u8> = if rng.chance(0.5) {
                (0..1 + rng.below(64))
                    .map(|_| rng.next_u64() as u8)
                    .collect()
            } else {
                vec![*pick(rng, &INTERESTING_U8); 1 + index(rng, 256)]
            };
            data.splice(at..at, bytes);
        }
        8 if len > 0 => {
            let start = index(rng, len);
            let n = 1 + index(rng, (len - start).min(256));
            let chunk = data[start..start + n].to_vec();
            let at = index(rng, len + 1);
            data.splice(at..at, chunk);
        }
        9 if len > 0 => data.truncate(index(rng, len)),
        10 if !donor.is_empty() => {
            let cut = index(rng, len + 1);
            let from = index(rng, donor.len());
            data.truncate(cut);
            data.extend_from_slice(&donor[from..]);
        }
        11 if !dict.is_empty() => {
            let token = *pick(rng, dict);
            let at = index(rng, len + 1);
            data.splice(at..at, token.iter().copied());
        }
        12 if !dict.is_empty() && len > 0 => {
            let token = *pick(rng, dict);
            let at = index(rng, len);
            let end = (at + token.len()).min(len);
            data.splice(at..end, token.iter().copied());
        }
        13 if len > 1 => {
            let (a, b) = (index(rng, len), index(rng, len));
            data.swap(a, b);
        }
        _ => data.push(rng.next_u64() as u8),
    }
}

fn corpus_dir(target: &str) -> PathBuf {
    workspace_root().join("tests/corpus").join(target)
}

/// The files of a corpus folder, by name.
fn corpus_files(target: &str) -> Vec<(String, Vec<u8>)> {
    let dir = corpus_dir(target);
    let mut files: Vec<(String, Vec<u8>)> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("reading {}: {e}", dir.display()))
        .filter_map(|e| e.ok())
        .filter(|e| e.path().is_file())
        .map(|e| {
            let name = e.file_name().to_string_lossy().into_owned();
            let bytes = std::fs::read(e.path()).expect("corpus file reads");
            (name, bytes)
        })
        .collect();
    files.sort_by(|a, b| a.0.cmp(&b.0));
    files
}

/// A scratch folder of this test under `target/test-scratch/`, emptied first.
fn scratch(name: &str) -> PathBuf {
    let dir = workspace_root()
        .join("target/test-scratch/fuzz")
        .join(format!("{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("scratch folder");
    dir
}

/// An error message reduced to its kind: paths, numbers and quoted header values removed, cut before any
/// parenthesis, at most 60 characters.
fn message_kind(text: &str, path: &Path) -> String {
    let mut text = text.replace(&path.display().to_string(), "<file>");
    if let Some(at) = text.find("colour space ") {
        let start = at + "colour space ".len();
        let end = text[start..]
            .find([' ', ':'])
            .map_or(text.len(), |e| start + e);
        text.replace_range(start..end, "<value>");
    }
    let text = text.split(" (").next().unwrap_or_default();
    let mut out = String::new();
    let mut in_number = false;
    for c in text.chars() {
        if c.is_ascii_digit() {
            if !in_number {
                out.push('#');
            }
            in_number = true;
        } else {
            in_number = false;
            out.push(c);
        }
    }
    out.chars().take(60).collect()
}

fn region_text(region: Option<Region>) -> String {
    match region {
        None => "whole".into(),
        Some(r) => format!("r{}_{}_{}_{}", r.x, r.y, r.width, r.height),
    }
}

fn parse_region(text: &str) -> Option<Option<Region>> {
    if text == "whole" {
        return Some(None);
    }
    let v: Vec<u32> = text
        .strip_prefix('r')?
        .split('_')
        .map(|n| n.parse().ok())
        .collect::<Option<_>>()?;
    let [x, y, width, height] = v[..] else {
        return None;
    };
    Some(Some(Region {
        x,
        y,
        width,
        height,
    }))
}

fn parse_limits(text: &str) -> Option<FrameLimits> {
    let (w, h) = text.strip_prefix('l')?.split_once('x')?;
    Some(FrameLimits {
        max_width: w.parse().ok()?,
        max_height: h.parse().ok()?,
    })
}

/// A dimension worth trying next to `current`.
fn dimension(rng: &mut Rng, current: u32, limit: u32) -> u32 {
    match rng.below(6) {
        0 => *pick(rng, &INTERESTING_U32),
        1 => limit.saturating_add(rng.below(3) as u32).saturating_sub(1),
        2 => current
            .saturating_add(rng.below(5) as u32)
            .saturating_sub(2),
        3 => current.saturating_mul(2),
        4 => rng.below(10_000) as u32,
        _ => current / 2,
    }
}

fn random_region(rng: &mut Rng, width: u32, height: u32) -> Option<Region> {
    match rng.below(6) {
        0 => None,
        1 => Some(Region::whole(width, height)),
        2 => Some(Region {
            x: *pick(rng, &INTERESTING_U32),
            y: *pick(rng, &INTERESTING_U32),
            width: *pick(rng, &INTERESTING_U32),
            height: *pick(rng, &INTERESTING_U32),
        }),
        _ => {
            let (w, h) = (width.max(1), height.max(1));
            let x = rng.below(u64::from(w)) as u32;
            let y = rng.below(u64::from(h)) as u32;
            Some(Region {
                x,
                y,
                width: 1 + rng.below(u64::from(w - x)) as u32 + u32::from(rng.chance(0.05)),
                height: 1 + rng.below(u64::from(h - y)) as u32,
            })
        }
    }
}

fn random_yuv(rng: &mut Rng) -> YuvSpec {
    YuvSpec {
        matrix: if rng.chance(0.5) {
            YuvMatrix::Bt601
        } else {
            YuvMatrix::Bt709
        },
        range: if rng.chance(0.5) {
            YuvRange::Limited
        } else {
            YuvRange::Full
        },
    }
}

// ---------------------------------------------------------------------------------------------------------
// Target 1: raw frames in every pixel format, through validation, conversion and (sometimes) the pipeline.
// ---------------------------------------------------------------------------------------------------------

const RAW_FORMATS: [PixelFormat; 11] = [
    PixelFormat::Rgb8,
    PixelFormat::Bgr8,
    PixelFormat::Rgba8,
    PixelFormat::Bgra8,
    PixelFormat::Gray8,
    PixelFormat::Nv12,
    PixelFormat::I420,
    PixelFormat::Yuyv,
    PixelFormat::Uyvy,
    PixelFormat::I422,
    PixelFormat::I444,
];

const SMALL_LIMITS: FrameLimits = FrameLimits {
    max_width: 512,
    max_height: 512,
};

const FRAME_LIMITS: [FrameLimits; 5] = [
    SMALL_LIMITS,
    DEFAULT_FRAME_LIMITS,
    FrameLimits {
        max_width: 1,
        max_height: 1,
    },
    FrameLimits {
        max_width: 16,
        max_height: 12,
    },
    FrameLimits {
        max_width: u32::MAX,
        max_height: u32::MAX,
    },
];

#[derive(Debug, Clone)]
struct RawFrame {
    format: PixelFormat,
    width: u32,
    height: u32,
    stride: u32,
    region: Option<Region>,
    limits: FrameLimits,
    yuv: YuvSpec,
    /// 0: conversion only; 1..=4: also the pipeline with that model variant.
    model: u8,
    data: Vec<u8>,
}

fn raw_frame_name(f: &RawFrame) -> String {
    format!(
        "{}-{}x{}-s{}-{}-l{}x{}-{}-{}-m{}.raw",
        f.format,
        f.width,
        f.height,
        f.stride,
        region_text(f.region),
        f.limits.max_width,
        f.limits.max_height,
        match f.yuv.matrix {
            YuvMatrix::Bt601 => "bt601",
            YuvMatrix::Bt709 => "bt709",
        },
        match f.yuv.range {
            YuvRange::Limited => "limited",
            YuvRange::Full => "full",
        },
        f.model
    )
}

fn parse_raw_frame(name: &str, data: Vec<u8>) -> Option<RawFrame> {
    let stem = name.strip_suffix(".raw")?;
    let fields: Vec<&str> = stem.split('-').collect();
    let [format, size, stride, region, limits, matrix, range, model] = fields[..] else {
        return None;
    };
    let (w, h) = size.split_once('x')?;
    Some(RawFrame {
        format: PixelFormat::from_name(format)?,
        width: w.parse().ok()?,
        height: h.parse().ok()?,
        stride: stride.strip_prefix('s')?.parse().ok()?,
        region: parse_region(region)?,
        limits: parse_limits(limits)?,
        yuv: YuvSpec {
            matrix: if matrix == "bt709" {
                YuvMatrix::Bt709
            } else {
                YuvMatrix::Bt601
            },
            range: if range == "full" {
                YuvRange::Full
            } else {
                YuvRange::Limited
            },
        },
        model: model.strip_prefix('m')?.parse().ok()?,
        data,
    })
}

/// Bytes of one row of the first plane.
fn row_bytes(format: PixelFormat, width: u64) -> u64 {
    match format {
        PixelFormat::Rgb8 | PixelFormat::Bgr8 => 3 * width,
        PixelFormat::Rgba8 | PixelFormat::Bgra8 => 4 * width,
        PixelFormat::Yuyv | PixelFormat::Uyvy => 2 * width,
        _ => width,
    }
}

/// The chroma planes of a planar layout: (columns, rows) per plane for a `w` x `h` frame, and the divisor of
/// the stride (the wire contract: `ceil(stride / 2)` for 4:2:x, the stride for 4:4:4).
fn chroma_planes(format: PixelFormat, w: u64, h: u64) -> Option<((u64, u64), u64)> {
    match format {
        PixelFormat::I420 => Some(((w.div_ceil(2), h.div_ceil(2)), 2)),
        PixelFormat::I422 => Some(((w.div_ceil(2), h), 2)),
        PixelFormat::I444 => Some(((w, h), 1)),
        _ => None,
    }
}

/// The sender's lengths from the wire contract (framewise.proto): every plane's rows padded to the stride
/// (planar chroma planes to ceil(stride / 2) for 4:2:x), and the same with the last row left unpadded.
fn sender_lengths(format: PixelFormat, width: u32, height: u32, stride: u32) -> (u64, u64) {
    let row = row_bytes(format, u64::from(width));
    let s = if stride == 0 { row } else { u64::from(stride) };
    let h = u64::from(height);
    if let Some(((cw, ch), div)) = chroma_planes(format, u64::from(width), h) {
        let c = s.div_ceil(div);
        let full = s * h + 2 * c * ch;
        return (full, full.saturating_sub(c - cw.min(c)));
    }
    match format {
        PixelFormat::Nv12 => (
            s * h + s * (h / 2),
            (s * h + s * (h / 2)).saturating_sub(s - row.min(s)),
        ),
        _ => (s * h, (s * h).saturating_sub(s - row.min(s))),
    }
}

/// Lays out tightly packed planes with rows padded to `stride` (0: packed).
fn pad_to_stride(
    format: PixelFormat,
    width: u32,
    height: u32,
    packed: &[u8],
    stride: u32,
) -> Vec<u8> {
    let row = row_bytes(format, u64::from(width)) as usize;
    if stride == 0 || stride as usize == row {
        return packed.to_vec();
    }
    let s = stride as usize;
    let h = height as usize;
    let planes: Vec<(usize, usize, usize)> =
        match chroma_planes(format, width.into(), height.into()) {
            // (rows, row bytes, stride)
            Some(((cw, ch), div)) => {
                let c = s.div_ceil(div as usize);
                vec![
                    (h, row, s),
                    (ch as usize, cw as usize, c),
                    (ch as usize, cw as usize, c),
                ]
            }
            None if format == PixelFormat::Nv12 => vec![(h, row, s), (h / 2, row, s)],
            None => vec![(h, row, s)],
        };
    let mut out = Vec::new();
    let mut at = 0;
    for (rows, bytes, stride) in planes {
        for _ in 0..rows {
            out.extend_from_slice(&packed[at..at + bytes]);
            out.resize(out.len() + stride - bytes, 0xA5);
            at += bytes;
        }
    }
    out
}

/// A well-formed random frame (noise content), to start mutations from something that converts.
fn fresh_frame(rng: &mut Rng) -> RawFrame {
    let format = *pick(rng, &RAW_FORMATS);
    let even = format.is_yuv() && rng.chance(0.9);
    let mut w = 1 + rng.below(160) as u32;
    let mut h = 1 + rng.below(120) as u32;
    if even {
        w = (w + 1) & !1;
        h = (h + 1) & !1;
    }
    let row = row_bytes(format, u64::from(w)) as u32;
    let pad = if rng.chance(0.5) {
        0
    } else {
        rng.below(10) as u32
    };
    let stride = if pad == 0 && rng.chance(0.5) {
        0
    } else {
        row + pad
    };
    let (full, least) = sender_lengths(format, w, h, stride);
    let len = if rng.chance(0.7) { full } else { least };
    let data = (0..len).map(|_| rng.next_u64() as u8).collect();
    RawFrame {
        format,
        width: w,
        height: h,
        stride,
        region: random_region(rng, w, h),
        limits: if rng.chance(0.8) {
            SMALL_LIMITS
        } else {
            *pick(rng, &FRAME_LIMITS)
        },
        yuv: random_yuv(rng),
        model: 0,
        data,
    }
}

fn mutate_frame(rng: &mut Rng, corpus: &[(String, RawFrame)]) -> RawFrame {
    let mut f = if rng.chance(0.3) {
        fresh_frame(rng)
    } else {
        pick(rng, corpus).1.clone()
    };
    for _ in 0..1 + rng.below(3) {
        match rng.below(9) {
            0 => f.width = dimension(rng, f.width, f.limits.max_width),
            1 => f.height = dimension(rng, f.height, f.limits.max_height),
            2 => {
                let row = row_bytes(f.format, u64::from(f.width)).min(u64::from(u32::MAX)) as u32;
                f.stride = match rng.below(5) {
                    0 => 0,
                    1 => row.saturating_add(rng.below(3) as u32).saturating_sub(1),
                    2 => *pick(rng, &INTERESTING_U32),
                    3 => row.saturating_add(1 + rng.below(64) as u32),
                    _ => rng.below(1000) as u32,
                }
            }
            3 => f.region = random_region(rng, f.width, f.height),
            4 => f.format = *pick(rng, &RAW_FORMATS),
            5 => f.limits = *pick(rng, &FRAME_LIMITS),
            6 => f.yuv = random_yuv(rng),
            7 => {
                let donor = pick(rng, corpus).1.data.clone();
                mutate_bytes(rng, &mut f.data, &donor, &[]);
            }
            _ => {
                let n = f.data.len();
                if rng.chance(0.5) {
                    f.data.truncate(index(rng, n + 1));
                } else {
                    f.data.resize(n + 1 + index(rng, 64), 0x5A);
                }
            }
        }
    }
    // Half the time, make the length what the geometry asks for, so that mutated geometry reaches conversion.
    if rng.chance(0.5) {
        let (full, least) = sender_lengths(f.format, f.width, f.height, f.stride);
        let want = match rng.below(4) {
            0 => full,
            1 => least,
            2 => full + 1,
            _ => least.saturating_sub(1),
        };
        if want <= MAX_INPUT as u64 {
            f.data.resize(want as usize, 0x3C);
        }
    }
    f.model = if rng.chance(0.15) {
        1 + rng.below(4) as u8
    } else {
        0
    };
    f
}

/// The demo model with each resize rule and interpolation (the same graph).
fn model_variants() -> Vec<Arc<Model>> {
    let mut models = vec![demo_model()];
    for (resize, interpolation) in [
        ("letterbox", "opencv-linear"),
        ("stretch", "pillow-bicubic"),
        ("letterbox", "float-bilinear"),
    ] {
        let manifest = DEMO_MANIFEST
            .replace(
                "resize = \"centre_crop\"",
                &format!("resize = \"{resize}\""),
            )
            .replace(
                "interpolation = \"opencv-area\"",
                &format!("interpolation = \"{interpolation}\""),
            );
        let package = ModelPackage::from_parts(&manifest, DEMO_ONNX).expect("variant parses");
        models.push(Arc::new(
            Model::load(&package, None).expect("variant loads"),
        ));
    }
    models
}

/// The oracle for a frame's conversion result, shared by the raw and the encoded targets.
fn check_conversion(
    result: &Result<(), framewise_engine::FrameError>,
    out: &RgbImage,
    region: Option<Region>,
    limits: &FrameLimits,
) -> Result<String, String> {
    match result {
        Ok(()) => {
            if out.data.len() != out.width as usize * out.height as usize * 3 {
                return Err(format!(
                    "{}x{} output holds {} bytes",
                    out.width,
                    out.height,
                    out.data.len()
                ));
            }
            if let Some(r) = region
                && (out.width, out.height) != (r.width, r.height)
            {
                return Err(format!(
                    "region {} gave a {}x{} output",
                    region_text(Some(r)),
                    out.width,
                    out.height
                ));
            }
            if region.is_none() && (out.width > limits.max_width || out.height > limits.max_height)
            {
                return Err(format!(
                    "a {}x{} frame passed limits of {}x{}",
                    out.width, out.height, limits.max_width, limits.max_height
                ));
            }
            Ok("accepted".into())
        }
        Err(e) => {
            let text = e.to_string();
            if text.len() < 20 {
                return Err(format!("unclear error `{text}`"));
            }
            Ok(e.kind().to_string())
        }
    }
}

#[test]
fn fuzz_raw_frames_in_every_pixel_format() {
    let corpus: Vec<(String, RawFrame)> = corpus_files("frames")
        .into_iter()
        .map(|(name, data)| {
            let frame = parse_raw_frame(&name, data)
                .unwrap_or_else(|| panic!("corpus file name {name} does not parse"));
            (name, frame)
        })
        .collect();
    let models = model_variants();
    let mut pipeline_scratch = pipeline::Scratch::default();
    let summary = fuzz(
        "frames",
        150_000,
        &corpus,
        mutate_frame,
        |f: &RawFrame| {
            let frame = FrameRef {
                format: f.format,
                width: f.width,
                height: f.height,
                stride: f.stride,
                data: &f.data,
            };
            let mut scratch = DecodeScratch::default();
            let mut out = RgbImage::default();
            let (result, usage) = metered(|| {
                frame::to_rgb(&frame, f.region, f.yuv, &f.limits, &mut scratch, &mut out)
            });
            // The size is checked against the limits before anything else: an empty or oversized declared
            // size is refused as such, whatever the buffer holds.
            let empty = f.width == 0 || f.height == 0;
            let over = f.width > f.limits.max_width || f.height > f.limits.max_height;
            let expected = if empty {
                Some("empty_size")
            } else if over {
                Some("too_large")
            } else {
                None
            };
            if let Some(kind) = expected {
                match &result {
                    Err(e) if e.kind() == kind => {}
                    other => {
                        return Verdict::Violation(format!(
                            "{}x{} with limits {}x{} gave {other:?}, not {kind}",
                            f.width, f.height, f.limits.max_width, f.limits.max_height
                        ));
                    }
                }
            }
            // Memory: a refusal allocates nothing but its message; a conversion at most its output and
            // repacked planes, all bounded by the bytes received.
            let bound = if result.is_ok() {
                4 * f.data.len() + (64 << 10)
            } else {
                64 << 10
            };
            if usage.largest > bound || usage.peak > 2 * bound {
                return Verdict::Violation(format!(
                    "{} bytes in allocated {} bytes at once and {} in all (bound {bound})",
                    f.data.len(),
                    usage.largest,
                    usage.peak
                ));
            }
            let kind = match check_conversion(&result, &out, f.region, &f.limits) {
                Ok(k) => k,
                Err(why) => return Verdict::Violation(why),
            };
            if result.is_err() {
                return Verdict::Refused(kind);
            }
            if f.model == 0 {
                return Verdict::Accepted(kind);
            }
            let model = &models[usize::from(f.model - 1) % models.len()];
            let spec = FrameSpec {
                region: f.region,
                yuv: f.yuv,
                limits: f.limits,
            };
            match pipeline::analyse(model, &frame, &spec, &mut pipeline_scratch) {
                Ok(a) => {
                    // Softmax outputs: each in [0, 1], summing to 1 (the definition of a probability vector).
                    let sum: f32 = a.raw.iter().sum();
                    let q = a.quality;
                    if a.raw.len() != model.classes().len()
                        || a.raw.iter().any(|p| !(0.0..=1.0).contains(p))
                        || (sum - 1.0).abs() > 1e-3
                        || !(q.focus.is_finite() && q.focus >= 0.0)
                        || !(0.0..=1.0).contains(&q.dark_share)
                        || !(0.0..=1.0).contains(&q.bright_share)
                    {
                        return Verdict::Violation(format!(
                            "the pipeline gave raw {:?} and quality {q:?}",
                            a.raw
                        ));
                    }
                    Verdict::Accepted("accepted+analysed".into())
                }
                Err(e) => Verdict::Violation(format!(
                    "conversion accepted the frame but the pipeline refused it: {e}"
                )),
            }
        },
        |f| (raw_frame_name(f), f.data.clone()),
    );
    summary.expect_reached(
        "frames",
        &[
            "accepted+analysed",
            "too_large",
            "empty_size",
            "bad_length",
            "bad_stride",
            "odd_dimension",
            "region_outside",
        ],
    );
}

// ---------------------------------------------------------------------------------------------------------
// Target 2: PNG and JPEG files.
// ---------------------------------------------------------------------------------------------------------

const PNG_SIGNATURE: &[u8] = b"\x89PNG\r\n\x1a\n";

/// CRC-32 as the PNG specification defines it (ISO/IEC 15948, Annex D: polynomial 0xEDB88320, reflected).
fn crc32(parts: &[&[u8]]) -> u32 {
    let mut crc = 0xFFFF_FFFFu32;
    for part in parts {
        for &b in *part {
            crc ^= u32::from(b);
            for _ in 0..8 {
                crc = if crc & 1 != 0 {
                    (crc >> 1) ^ 0xEDB8_8320
                } else {
                    crc >> 1
                };
            }
        }
    }
    !crc
}

#[derive(Debug, Clone)]
struct Chunk {
    kind: [u8; 4],
    data: Vec<u8>,
}

/// The chunks of a PNG file, and whatever trails the last whole chunk.
fn png_parse(d: &[u8]) -> Option<(Vec<Chunk>, Vec<u8>)> {
    if !d.starts_with(PNG_SIGNATURE) {
        return None;
    }
    let mut chunks = Vec::new();
    let mut p = PNG_SIGNATURE.len();
    while p + 12 <= d.len() {
        let len = u32::from_be_bytes([d[p], d[p + 1], d[p + 2], d[p + 3]]) as usize;
        if p + 12 + len > d.len() {
            break;
        }
        let kind = [d[p + 4], d[p + 5], d[p + 6], d[p + 7]];
        chunks.push(Chunk {
            kind,
            data: d[p + 8..p + 8 + len].to_vec(),
        });
        p += 12 + len;
    }
    Some((chunks, d[p..].to_vec()))
}

/// A PNG file from chunks, with correct lengths and CRCs.
fn png_build(chunks: &[Chunk], trailer: &[u8]) -> Vec<u8> {
    let mut out = PNG_SIGNATURE.to_vec();
    for c in chunks {
        out.extend_from_slice(&(c.data.len() as u32).to_be_bytes());
        out.extend_from_slice(&c.kind);
        out.extend_from_slice(&c.data);
        out.extend_from_slice(&crc32(&[&c.kind, &c.data]).to_be_bytes());
    }
    out.extend_from_slice(trailer);
    out
}

/// Width and height from the IHDR chunk, when the file starts with a well-formed one.
fn png_declared(d: &[u8]) -> Option<(u32, u32)> {
    let (chunks, _) = png_parse(d)?;
    let first = chunks
        .first()
        .filter(|c| &c.kind == b"IHDR" && c.data.len() == 13)?;
    let w = u32::from_be_bytes([first.data[0], first.data[1], first.data[2], first.data[3]]);
    let h = u32::from_be_bytes([first.data[4], first.data[5], first.data[6], first.data[7]]);
    Some((w, h))
}

fn png_set_size(d: &[u8], width: u32, height: u32) -> Option<Vec<u8>> {
    let (mut chunks, trailer) = png_parse(d)?;
    let ihdr = chunks
        .iter_mut()
        .find(|c| &c.kind == b"IHDR" && c.data.len() == 13)?;
    ihdr.data[..4].copy_from_slice(&width.to_be_bytes());
    ihdr.data[4..8].copy_from_slice(&height.to_be_bytes());
    Some(png_build(&chunks, &trailer))
}

const PNG_KINDS: [&[u8; 4]; 16] = [
    b"IHDR", b"PLTE", b"IDAT", b"IEND", b"tRNS", b"gAMA", b"cHRM", b"sRGB", b"iCCP", b"zTXt",
    b"tEXt", b"iTXt", b"acTL", b"fcTL", b"fdAT", b"zzZz",
];

fn mutate_png(rng: &mut Rng, d: &mut Vec<u8>) {
    let Some((mut chunks, trailer)) = png_parse(d) else {
        mutate_bytes(rng, d, &[], &[PNG_SIGNATURE, b"IHDR", b"IDAT", b"IEND"]);
        return;
    };
    if chunks.is_empty() {
        return;
    }
    let mut lie: Option<(usize, u32)> = None;
    match rng.below(9) {
        0 => {
            if let Some(ihdr) = chunks
                .iter_mut()
                .find(|c| &c.kind == b"IHDR" && c.data.len() == 13)
            {
                let which = rng.below(3);
                let value = dimension(rng, 64, 512);
                if which != 1 {
                    ihdr.data[..4].copy_from_slice(&value.to_be_bytes());
                }
                if which != 0 {
                    let value = dimension(rng, 48, 512);
                    ihdr.data[4..8].copy_from_slice(&value.to_be_bytes());
                }
            }
        }
        1 => {
            if let Some(ihdr) = chunks
                .iter_mut()
                .find(|c| &c.kind == b"IHDR" && c.data.len() == 13)
            {
                let field = 8 + index(rng, 5);
                ihdr.data[field] = *pick(rng, &[0u8, 1, 2, 3, 4, 5, 6, 7, 8, 16, 32, 255]);
            }
        }
        2 => {
            let i = index(rng, chunks.len());
            lie = Some((i, *pick(rng, &INTERESTING_U32)));
        }
        3 => {
            let i = index(rng, chunks.len());
            let mut data = std::mem::take(&mut chunks[i].data);
            mutate_bytes(rng, &mut data, &[], &[]);
            chunks[i].data = data;
        }
        4 => {
            let i = index(rng, chunks.len());
            let copy = chunks[i].clone();
            chunks.insert(index(rng, chunks.len() + 1), copy);
        }
        5 => {
            chunks.remove(index(rng, chunks.len()));
        }
        6 => {
            let (a, b) = (index(rng, chunks.len()), index(rng, chunks.len()));
            chunks.swap(a, b);
        }
        7 => {
            let kind = **pick(rng, &PNG_KINDS);
            let n = if &kind == b"PLTE" {
                3 * index(rng, 300)
            } else {
                index(rng, 64)
            };
            let data = (0..n).map(|_| rng.next_u64() as u8).collect();
            chunks.insert(index(rng, chunks.len() + 1), Chunk { kind, data });
        }
        _ => {
            if let Some(idat) = chunks.iter_mut().rfind(|c| &c.kind == b"IDAT") {
                let n = idat.data.len();
                idat.data.truncate(index(rng, n + 1));
            }
        }
    }
    *d = png_build(&chunks, &trailer);
    if let Some((i, value)) = lie {
        let at = PNG_SIGNATURE.len() + chunks[..i].iter().map(|c| 12 + c.data.len()).sum::<usize>();
        d[at..at + 4].copy_from_slice(&value.to_be_bytes());
    }
}

/// JPEG marker segments up to the first scan: (offset of the 0xFF, marker, length field or 0).
fn jpeg_segments(d: &[u8]) -> Vec<(usize, u8, usize)> {
    let mut out = Vec::new();
    if !d.starts_with(&[0xFF, 0xD8]) {
        return out;
    }
    let mut p = 2;
    while p + 1 < d.len() && d[p] == 0xFF {
        let marker = d[p + 1];
        if marker == 0xFF {
            p += 1;
            continue;
        }
        if (0xD0..=0xD9).contains(&marker) || marker == 0x01 {
            out.push((p, marker, 0));
            p += 2;
            continue;
        }
        if p + 4 > d.len() {
            break;
        }
        let len = usize::from(u16::from_be_bytes([d[p + 2], d[p + 3]]));
        out.push((p, marker, len));
        if marker == 0xDA {
            break;
        }
        p += 2 + len;
    }
    out
}

fn is_sof(marker: u8) -> bool {
    (0xC0..=0xCF).contains(&marker) && !matches!(marker, 0xC4 | 0xC8 | 0xCC)
}

/// Width and height from the first frame header, when there is one.
fn jpeg_declared(d: &[u8]) -> Option<(u32, u32)> {
    let (p, _, _) = *jpeg_segments(d).iter().find(|s| is_sof(s.1))?;
    let b = d.get(p + 5..p + 9)?;
    Some((
        u32::from(u16::from_be_bytes([b[2], b[3]])),
        u32::from(u16::from_be_bytes([b[0], b[1]])),
    ))
}

fn jpeg_set_size(d: &[u8], width: u16, height: u16) -> Option<Vec<u8>> {
    let (p, _, _) = *jpeg_segments(d).iter().find(|s| is_sof(s.1))?;
    let mut out = d.to_vec();
    out.get_mut(p + 5..p + 9)?;
    out[p + 5..p + 7].copy_from_slice(&height.to_be_bytes());
    out[p + 7..p + 9].copy_from_slice(&width.to_be_bytes());
    Some(out)
}

const JPEG_SIZES: [u16; 20] = [
    0, 1, 2, 7, 8, 15, 16, 17, 47, 48, 49, 63, 64, 65, 511, 512, 513, 8193, 16385, 65535,
];

fn mutate_jpeg(rng: &mut Rng, d: &mut Vec<u8>) {
    let segments = jpeg_segments(d);
    if segments.is_empty() {
        mutate_bytes(
            rng,
            d,
            &[],
            &[&[0xFF, 0xD8], &[0xFF, 0xC0], &[0xFF, 0xDA], &[0xFF, 0xD9]],
        );
        return;
    }
    let sof = segments.iter().find(|s| is_sof(s.1)).copied();
    let (p, _, len) = *pick(rng, &segments);
    match rng.below(8) {
        0 => {
            if let Some((p, _, _)) = sof
                && p + 9 <= d.len()
            {
                let at = p + 5 + 2 * index(rng, 2);
                d[at..at + 2].copy_from_slice(&pick(rng, &JPEG_SIZES).to_be_bytes());
            }
        }
        1 => {
            if let Some((p, _, _)) = sof {
                d[p + 1] = *pick(
                    rng,
                    &[
                        0xC0u8, 0xC1, 0xC2, 0xC3, 0xC5, 0xC6, 0xC7, 0xC9, 0xCA, 0xCB, 0xCD, 0xCE,
                        0xCF,
                    ],
                );
            }
        }
        2 => {
            if let Some((p, _, _)) = sof
                && p + 12 <= d.len()
            {
                match rng.below(3) {
                    0 => d[p + 9] = *pick(rng, &[0u8, 1, 2, 3, 4, 5, 255]),
                    1 => {
                        let comps = usize::from(d[p + 9]).max(1);
                        let at = p + 10 + 3 * index(rng, comps) + 1;
                        if at < d.len() {
                            d[at] = *pick(
                                rng,
                                &[0x11u8, 0x12, 0x21, 0x22, 0x41, 0x14, 0x44, 0x00, 0x33, 0xFF],
                            );
                        }
                    }
                    _ => d[p + 4] = *pick(rng, &[8u8, 12, 16, 0, 255]),
                }
            }
        }
        3 if len > 0 => {
            let v = *pick(rng, &INTERESTING_U32) as u16;
            d[p + 2..p + 4].copy_from_slice(&v.to_be_bytes());
        }
        4 => {
            let end = (p + 2 + len).min(d.len());
            d.drain(p..end);
        }
        5 => {
            let end = (p + 2 + len).min(d.len());
            let copy = d[p..end].to_vec();
            d.splice(p..p, copy);
        }
        6 => {
            if let Some(&(sos, _, sos_len)) = segments.iter().find(|s| s.1 == 0xDA) {
                let start = (sos + 2 + sos_len).min(d.len());
                let at = start + index(rng, d.len() - start + 1);
                match rng.below(3) {
                    0 => {
                        let marker =
                            *pick(rng, &[0xD0u8, 0xD3, 0xD7, 0xD9, 0x00, 0xC4, 0xDA, 0xFF]);
                        d.splice(at..at, [0xFF, marker]);
                    }
                    1 => d.truncate(at),
                    _ => {
                        let bytes: Vec<u8> = (0..1 + rng.below(32))
                            .map(|_| rng.next_u64() as u8)
                            .collect();
                        d.splice(at..at, bytes);
                    }
                }
            }
        }
        _ => {
            if len > 2 {
                let end = (p + 2 + len).min(d.len());
                let mut body = d[p + 4..end].to_vec();
                mutate_bytes(rng, &mut body, &[], &[]);
                d.splice(p + 4..end, body);
            }
        }
    }
}

#[derive(Debug, Clone)]
struct Encoded {
    format: PixelFormat,
    limits: FrameLimits,
    region: Option<Region>,
    data: Vec<u8>,
}

const ENCODED_LIMITS: [FrameLimits; 6] = [
    FrameLimits {
        max_width: 1024,
        max_height: 1024,
    },
    FrameLimits {
        max_width: 256,
        max_height: 256,
    },
    FrameLimits {
        max_width: 64,
        max_height: 48,
    },
    FrameLimits {
        max_width: 63,
        max_height: 48,
    },
    FrameLimits {
        max_width: 64,
        max_height: 47,
    },
    FrameLimits {
        max_width: 1,
        max_height: 1,
    },
];

fn encoded_name(e: &Encoded) -> String {
    format!(
        "l{}x{}-{}.{}",
        e.limits.max_width,
        e.limits.max_height,
        region_text(e.region),
        if e.format == PixelFormat::Png {
            "png"
        } else {
            "jpg"
        }
    )
}

fn parse_encoded(name: &str, data: Vec<u8>) -> Option<Encoded> {
    let (stem, ext) = name.rsplit_once('.')?;
    let format = match ext {
        "png" => PixelFormat::Png,
        "jpg" | "jpeg" => PixelFormat::Jpeg,
        _ => return None,
    };
    let mut e = Encoded {
        format,
        limits: ENCODED_LIMITS[0],
        region: None,
        data,
    };
    for field in stem.split('-') {
        if let Some(limits) = parse_limits(field) {
            e.limits = limits;
        } else if let Some(Some(region)) = parse_region(field) {
            e.region = Some(region);
        }
    }
    Some(e)
}

const ENCODED_DICT: [&[u8]; 10] = [
    PNG_SIGNATURE,
    b"IHDR",
    b"IDAT",
    b"IEND",
    b"PLTE",
    &[0xFF, 0xD8],
    &[0xFF, 0xC0],
    &[0xFF, 0xC4],
    &[0xFF, 0xDA],
    &[0xFF, 0xD9],
];

fn mutate_encoded(rng: &mut Rng, corpus: &[(String, Encoded)]) -> Encoded {
    let mut e = pick(rng, corpus).1.clone();
    for _ in 0..1 + rng.below(3) {
        match rng.below(10) {
            0..=4 => {
                if e.format == PixelFormat::Png {
                    mutate_png(rng, &mut e.data)
                } else {
                    mutate_jpeg(rng, &mut e.data)
                }
            }
            5 | 6 => {
                let donor = pick(rng, corpus).1.data.clone();
                mutate_bytes(rng, &mut e.data, &donor, &ENCODED_DICT);
                // Often repair the CRCs, so that the mutation reaches the decoder rather than the CRC check.
                if e.format == PixelFormat::Png
                    && rng.chance(0.6)
                    && let Some((chunks, trailer)) = png_parse(&e.data)
                {
                    e.data = png_build(&chunks, &trailer);
                }
            }
            7 => e.limits = *pick(rng, &ENCODED_LIMITS),
            8 => e.region = random_region(rng, 64, 48),
            _ => {
                if rng.chance(0.1) {
                    e.format = if e.format == PixelFormat::Png {
                        PixelFormat::Jpeg
                    } else {
                        PixelFormat::Png
                    };
                }
            }
        }
    }
    e
}

/// Memory an encoded frame may take: a few buffers of the largest image the limits allow (8 bytes a pixel
/// for 16-bit RGBA, padded to whole 32-pixel JPEG blocks), plus the PNG decoder's budget for what it reads
/// besides the pixels (frame.rs: 8 times the file, 4 rows, 1 MiB), doubled as vectors grow by doubling.
fn encoded_bound(limits: &FrameLimits, file: usize) -> usize {
    let (w, h) = (
        limits.max_width as usize + 64,
        limits.max_height as usize + 64,
    );
    let side = 8 * file + 32 * limits.max_width as usize + (1 << 20);
    16 * w * h + 2 * side
}

/// Converts an encoded frame with fresh buffers, metered.
fn convert_encoded(e: &Encoded) -> (Result<(), framewise_engine::FrameError>, RgbImage, Usage) {
    let frame = FrameRef {
        format: e.format,
        width: 0,
        height: 0,
        stride: 0,
        data: &e.data,
    };
    let mut scratch = DecodeScratch::default();
    let mut out = RgbImage::default();
    let (result, usage) = metered(|| {
        frame::to_rgb(
            &frame,
            e.region,
            YuvSpec::default(),
            &e.limits,
            &mut scratch,
            &mut out,
        )
    });
    (result, out, usage)
}

/// Declared sizes above the limits, written cleanly into valid files, are refused as too large before any
/// pixel buffer is allocated: with the default limits and with small ones.
fn declared_size_checks(corpus: &[(String, Encoded)]) -> usize {
    let mut checked = 0;
    for (name, e) in corpus {
        if name.starts_with("regression") {
            continue;
        }
        for limits in [DEFAULT_FRAME_LIMITS, ENCODED_LIMITS[2]] {
            let sizes: Vec<(u32, u32)> = vec![
                (limits.max_width + 1, 1),
                (1, limits.max_height + 1),
                (limits.max_width + 1, limits.max_height + 1),
                (65535, 65535),
                (0x7FFF_FFFF, 0x7FFF_FFFF),
                (u32::MAX, u32::MAX),
            ];
            for (w, h) in sizes {
                let data = if e.format == PixelFormat::Png {
                    png_set_size(&e.data, w, h)
                } else if w <= 65535 && h <= 65535 {
                    jpeg_set_size(&e.data, w as u16, h as u16)
                } else {
                    None
                };
                let Some(data) = data else { continue };
                let probe = Encoded {
                    format: e.format,
                    limits,
                    region: None,
                    data,
                };
                let (result, _, usage) = convert_encoded(&probe);
                let kind = result.as_ref().err().map(|e| e.kind());
                assert_eq!(
                    kind,
                    Some("too_large"),
                    "{name} declaring {w}x{h} under limits {}x{}: {result:?}",
                    limits.max_width,
                    limits.max_height
                );
                let bound = 4 * probe.data.len() + (256 << 10);
                assert!(
                    usage.largest <= bound,
                    "{name} declaring {w}x{h}: refused, but after allocating {} bytes at once (bound {bound})",
                    usage.largest
                );
                checked += 1;
            }
        }
    }
    checked
}

/// Writes a deflate stream bit by bit (RFC 1951: fields least significant bit first, Huffman codes most
/// significant bit first).
#[derive(Default)]
struct BitWriter {
    out: Vec<u8>,
    bit: u32,
}

impl BitWriter {
    fn bits(&mut self, value: u32, n: u32) {
        for i in 0..n {
            self.push((value >> i) & 1);
        }
    }

    fn code(&mut self, code: u32, n: u32) {
        for i in (0..n).rev() {
            self.push((code >> i) & 1);
        }
    }

    fn push(&mut self, b: u32) {
        if self.bit == 0 {
            self.out.push(0);
        }
        if let Some(last) = self.out.last_mut() {
            *last |= (b as u8) << self.bit;
        }
        self.bit = (self.bit + 1) % 8;
    }
}

/// A zlib stream (RFC 1950) that inflates to about `inflated` zero bytes: one fixed-Huffman block of a
/// literal 0 and then copies of 258 bytes at distance 1 (13 bits each, RFC 1951 section 3.2.6).
fn inflation_bomb(inflated: usize) -> Vec<u8> {
    let mut w = BitWriter::default();
    w.bits(1, 1); // last block
    w.bits(1, 2); // fixed Huffman codes
    w.code(0x30, 8); // literal 0
    for _ in 0..inflated / 258 {
        w.code(0xC5, 8); // length 258 (symbol 285)
        w.code(0, 5); // distance 1
    }
    w.code(0, 7); // end of block
    let mut out = vec![0x78, 0x01];
    out.extend_from_slice(&w.out);
    // Adler-32 of the zeros (RFC 1950): a = 1, b = n mod 65521.
    let n = (1 + 258 * (inflated / 258)) as u64;
    let adler = ((n % 65521) << 16) | 1;
    out.extend_from_slice(&(adler as u32).to_be_bytes());
    out
}

/// A valid PNG with an iCCP chunk holding an ICC profile that inflates to `inflated` bytes.
fn png_with_profile_bomb(png: &[u8], inflated: usize) -> Vec<u8> {
    let (mut chunks, trailer) = png_parse(png).expect("a PNG");
    let mut data = b"bomb\0\0".to_vec();
    data.extend_from_slice(&inflation_bomb(inflated));
    chunks.insert(
        1,
        Chunk {
            kind: *b"iCCP",
            data,
        },
    );
    png_build(&chunks, &trailer)
}

#[test]
fn an_icc_profile_inflation_bomb_stays_within_the_memory_bound() {
    // Metadata is read before the size check, so an ICC profile of gigabytes packed into a small frame must
    // not be inflated whole: the decoder may spend a few times the file's size on what it does not use.
    let png = std::fs::read(corpus_dir("encoded").join("phantom-64x48.png")).expect("corpus PNG");
    for (inflated, limits) in [
        (8 << 20, ENCODED_LIMITS[2]),
        (64 << 20, DEFAULT_FRAME_LIMITS),
    ] {
        let data = png_with_profile_bomb(&png, inflated);
        let e = Encoded {
            format: PixelFormat::Png,
            limits,
            region: None,
            data,
        };
        let (result, _, usage) = convert_encoded(&e);
        let bound = 8 * e.data.len() + (2 << 20);
        eprintln!(
            "profile inflating to {inflated} bytes in a {} byte PNG: {:?}, largest allocation {} bytes",
            e.data.len(),
            result.as_ref().map_err(|e| e.kind()),
            usage.largest
        );
        assert!(
            usage.largest <= bound,
            "a {} byte PNG made the decoder allocate {} bytes at once (bound {bound})",
            e.data.len(),
            usage.largest
        );
    }
}

#[test]
fn fuzz_png_and_jpeg_frames() {
    let corpus: Vec<(String, Encoded)> = corpus_files("encoded")
        .into_iter()
        .filter_map(|(name, data)| Some((name.clone(), parse_encoded(&name, data)?)))
        .collect();
    // Every seed converts: the decoders take well-formed files of each kind.
    for (name, e) in &corpus {
        if !name.starts_with("regression") {
            let (result, _, _) = convert_encoded(e);
            assert!(result.is_ok(), "corpus file {name}: {result:?}");
        }
    }
    let checked = declared_size_checks(&corpus);
    eprintln!("fuzz encoded: {checked} declared sizes above the limits refused as too_large");
    let summary = fuzz(
        "encoded",
        40_000,
        &corpus,
        mutate_encoded,
        |e: &Encoded| {
            let (result, out, usage) = convert_encoded(e);
            let bound = encoded_bound(&e.limits, e.data.len());
            if usage.largest > bound || usage.peak > 2 * bound {
                return Verdict::Violation(format!(
                    "allocated {} bytes at once and {} in all (bound {bound} for limits {}x{})",
                    usage.largest, usage.peak, e.limits.max_width, e.limits.max_height
                ));
            }
            // A PNG's IHDR is authoritative: an accepted file decodes to the size it declares.
            if result.is_ok()
                && e.region.is_none()
                && e.format == PixelFormat::Png
                && let Some(declared) = png_declared(&e.data)
                && declared != (out.width, out.height)
            {
                return Verdict::Violation(format!(
                    "IHDR declares {declared:?} but {}x{} came out",
                    out.width, out.height
                ));
            }
            match check_conversion(&result, &out, e.region, &e.limits) {
                Ok(kind) if result.is_ok() => Verdict::Accepted(format!("{}:{kind}", e.format)),
                Ok(kind) => Verdict::Refused(format!("{}:{kind}", e.format)),
                Err(why) => Verdict::Violation(why),
            }
        },
        |e| (encoded_name(e), e.data.clone()),
    );
    summary.expect_reached(
        "encoded",
        &[
            "png:accepted",
            "jpeg:accepted",
            "png:too_large",
            "jpeg:too_large",
            "png:decode_failed",
            "jpeg:decode_failed",
        ],
    );
    // Keep the helper honest: the JPEG size reader finds the corpus's frame header.
    assert!(
        corpus
            .iter()
            .any(|(_, e)| e.format == PixelFormat::Jpeg && jpeg_declared(&e.data).is_some())
    );
}

// ---------------------------------------------------------------------------------------------------------
// Target 3: the model manifest.
// ---------------------------------------------------------------------------------------------------------

#[derive(Debug, Clone)]
struct ManifestInput {
    text: String,
    /// Also load the package with the demo graph when the manifest parses.
    load: bool,
}

const TOML_KEYS: [&str; 22] = [
    "name",
    "version",
    "file",
    "classes",
    "intended_use",
    "caution",
    "trained",
    "input",
    "output",
    "tensor",
    "layout",
    "width",
    "height",
    "colour_order",
    "scale",
    "mean",
    "std",
    "resize",
    "interpolation",
    "letterbox_fill",
    "kind",
    "color_order",
];

const TOML_VALUES: [&str; 46] = [
    "0",
    "-1",
    "1",
    "96",
    "4096",
    "4097",
    "4294967295",
    "4294967296",
    "9223372036854775807",
    "18446744073709551616",
    "0.0",
    "-0.0",
    "1e-320",
    "1e308",
    "1e309",
    "nan",
    "+nan",
    "-nan",
    "inf",
    "-inf",
    "0x10",
    "0o7",
    "0b1",
    "1_000",
    "true",
    "\"\"",
    "\" \"",
    "\"nchw\"",
    "\"nhwc\"",
    "\"rgb\"",
    "\"bgr\"",
    "\"letterbox\"",
    "\"stretch\"",
    "\"bilinear\"",
    "\"opencv-linear\"",
    "\"pillow-bicubic\"",
    "\"probabilities\"",
    "[]",
    "[0.5]",
    "[0.5, 0.5, 0.5, 0.5]",
    "[\"a\", \"a\"]",
    "[\"a\", 1]",
    "{ a = 1 }",
    "1979-05-27T07:32:00Z",
    "'''multi\nline'''",
    "\"\\u0000\"",
];

const TOML_DICT: [&[u8]; 16] = [
    b"=",
    b"[",
    b"]",
    b"[[",
    b"]]",
    b"{",
    b"}",
    b"\"",
    b"'''",
    b"\"\"\"",
    b"\\",
    b"#",
    b"\n",
    b",",
    b"[input]",
    b"[output]",
];

fn manifest_lines(text: &str) -> Vec<String> {
    text.lines().map(str::to_string).collect()
}

fn mutate_manifest(rng: &mut Rng, corpus: &[(String, ManifestInput)]) -> ManifestInput {
    let mut text = pick(rng, corpus).1.text.clone();
    for _ in 0..1 + rng.below(4) {
        let mut lines = manifest_lines(&text);
        match rng.below(8) {
            0 => {
                let mut bytes = text.into_bytes();
                let donor = pick(rng, corpus).1.text.clone();
                mutate_bytes(rng, &mut bytes, donor.as_bytes(), &TOML_DICT);
                text = String::from_utf8_lossy(&bytes).into_owned();
                continue;
            }
            1 => {
                // A value of the right type but a doubtful size, for the key it goes with.
                let typed: &[(&str, &[&str])] = &[
                    (
                        "width",
                        &["0", "1", "95", "96", "97", "4096", "4097", "-96", "65536"],
                    ),
                    ("height", &["0", "1", "96", "4096", "4097", "100000"]),
                    ("letterbox_fill", &["0", "255", "256", "-1"]),
                    (
                        "scale",
                        &[
                            "0.0", "-0.0", "1e-320", "nan", "inf", "-1.0", "1e308", "0.004",
                        ],
                    ),
                    (
                        "mean",
                        &[
                            "[0.5, 0.5, 0.5]",
                            "[nan, 0.5, 0.5]",
                            "[inf, 0, 0]",
                            "[0.5, 0.5]",
                            "[1e308, -1e308, 0]",
                        ],
                    ),
                    (
                        "std",
                        &[
                            "[0.25, 0.25, 0.25]",
                            "[0.0, 1.0, 1.0]",
                            "[-1, 1, 1]",
                            "[nan, 1, 1]",
                            "[5e-324, 1, 1]",
                            "[1, 1, 1, 1]",
                        ],
                    ),
                    (
                        "classes",
                        &[
                            "[]",
                            "[\"a\"]",
                            "[\"a\", \"a\"]",
                            "[\"\"]",
                            "[\"a\", \"b\", \"c\", \"d\"]",
                            "[\"plain\", \"dotted\", \"striped\", \"grid\", \"extra\"]",
                        ],
                    ),
                    ("name", &["\"\"", "\"   \"", "\"\\u0000\"", "\"é\""]),
                    (
                        "file",
                        &["\"\"", "\" \"", "\"../../etc/x\"", "\"/dev/zero\""],
                    ),
                    (
                        "tensor",
                        &["\"\"", "\"frames\"", "\"logits\"", "\"images\""],
                    ),
                    ("layout", &["\"nchw\"", "\"nhwc\"", "\"NCHW\"", "\"\""]),
                    ("kind", &["\"logits\"", "\"probabilities\"", "\"scores\""]),
                ];
                let (key, values) = typed[index(rng, typed.len())];
                let prefix = format!("{key} = ");
                if let Some(line) = lines.iter_mut().find(|l| l.starts_with(&prefix)) {
                    *line = format!("{prefix}{}", pick(rng, values));
                }
            }
            2 => {
                let with_value: Vec<usize> = (0..lines.len())
                    .filter(|&i| lines[i].contains(" = "))
                    .collect();
                if !with_value.is_empty() {
                    let i = *pick(rng, &with_value);
                    let key = lines[i].split(" = ").next().unwrap_or("").to_string();
                    lines[i] = format!("{key} = {}", pick(rng, &TOML_VALUES));
                }
            }
            3 => {
                let with_value: Vec<usize> = (0..lines.len())
                    .filter(|&i| lines[i].contains(" = "))
                    .collect();
                if !with_value.is_empty() {
                    let i = *pick(rng, &with_value);
                    let value = lines[i]
                        .split_once(" = ")
                        .map_or("", |(_, v)| v)
                        .to_string();
                    lines[i] = format!("{} = {value}", pick(rng, &TOML_KEYS));
                }
            }
            4 if !lines.is_empty() => {
                let i = index(rng, lines.len());
                match rng.below(4) {
                    0 => {
                        lines.remove(i);
                    }
                    1 => {
                        let line = lines[i].clone();
                        lines.insert(index(rng, lines.len() + 1), line);
                    }
                    2 => {
                        let j = index(rng, lines.len());
                        lines.swap(i, j);
                    }
                    _ => {
                        let line = match rng.below(4) {
                            0 => format!("[{}]", pick(rng, &TOML_KEYS)),
                            1 => format!("[[{}]]", pick(rng, &TOML_KEYS)),
                            2 => format!("{} = {}", pick(rng, &TOML_KEYS), pick(rng, &TOML_VALUES)),
                            _ => "[input.extra]".into(),
                        };
                        lines.insert(i, line);
                    }
                }
            }
            5 => {
                // Deep nesting: arrays or inline tables thousands deep.
                let depth = *pick(rng, &[8usize, 64, 200, 1_000, 5_000, 30_000]);
                let value = if rng.chance(0.5) {
                    format!("{}{}", "[".repeat(depth), "]".repeat(depth))
                } else {
                    format!("{}1{}", "{ a = ".repeat(depth), " }".repeat(depth))
                };
                let key = pick(rng, &TOML_KEYS);
                lines.insert(index(rng, lines.len() + 1), format!("{key} = {value}"));
            }
            6 => {
                // Large values: a long string, a long array, thousands of classes.
                let value = match rng.below(3) {
                    0 => format!("\"{}\"", "x".repeat(100_000)),
                    1 => format!("[{}]", vec!["0.5"; 20_000].join(", ")),
                    _ => format!(
                        "[{}]",
                        (0..5_000)
                            .map(|i| format!("\"c{i}\""))
                            .collect::<Vec<_>>()
                            .join(", ")
                    ),
                };
                let key = *pick(rng, &["classes", "mean", "name", "intended_use", "std"]);
                lines.retain(|l| !l.starts_with(&format!("{key} =")));
                let at = if key == "mean" || key == "std" {
                    lines
                        .iter()
                        .position(|l| l == "[input]")
                        .map_or(lines.len(), |p| p + 1)
                } else {
                    0
                };
                lines.insert(at, format!("{key} = {value}"));
            }
            _ => {
                let donor = manifest_lines(&pick(rng, corpus).1.text);
                if !donor.is_empty() && !lines.is_empty() {
                    let cut = index(rng, lines.len());
                    let from = index(rng, donor.len());
                    lines.truncate(cut);
                    lines.extend_from_slice(&donor[from..]);
                }
            }
        }
        text = lines.join("\n");
    }
    ManifestInput {
        text,
        load: rng.chance(0.04),
    }
}

fn model_error_kind(e: &ModelError) -> String {
    match e {
        ModelError::Io { .. } => "io".into(),
        ModelError::Manifest(_) => "manifest".into(),
        ModelError::NotOnnx(_) => "not_onnx".into(),
        ModelError::TooLarge(_) => "too_large".into(),
        ModelError::Mismatch { field, .. } => format!("mismatch:{field}"),
        ModelError::UnsupportedOperator { .. } => "unsupported_operator".into(),
        ModelError::HashMismatch { .. } => "hash_mismatch".into(),
        ModelError::Engine { .. } => "engine".into(),
        _ => "other".into(),
    }
}

/// What an accepted manifest guarantees (manifest.rs documents each rule).
fn manifest_invariants(m: &Manifest) -> Result<(), String> {
    let i = &m.input;
    let classes_unique = m.classes.iter().collect::<BTreeSet<_>>().len() == m.classes.len();
    let ok = !m.name.trim().is_empty()
        && !m.file.trim().is_empty()
        && !m.classes.is_empty()
        && classes_unique
        && !i.tensor.is_empty()
        && (1..=framewise_engine::manifest::MAX_INPUT_SIDE).contains(&i.width)
        && (1..=framewise_engine::manifest::MAX_INPUT_SIDE).contains(&i.height)
        && i.scale.is_finite()
        && i.scale > 0.0
        && i.mean.iter().all(|v| v.is_finite())
        && i.std.iter().all(|v| v.is_finite() && *v > 0.0);
    if ok {
        Ok(())
    } else {
        Err(format!("an accepted manifest breaks its rules: {m:?}"))
    }
}

#[test]
fn fuzz_model_manifest() {
    let corpus: Vec<(String, ManifestInput)> = corpus_files("manifest")
        .into_iter()
        .map(|(name, bytes)| {
            let text = String::from_utf8(bytes).expect("corpus manifests are UTF-8");
            (name, ManifestInput { text, load: true })
        })
        .collect();
    let mut loads = 0u32;
    let summary = fuzz(
        "manifest",
        12_000,
        &corpus,
        mutate_manifest,
        |input: &ManifestInput| {
            let manifest = match Manifest::parse(&input.text) {
                Err(ManifestError::Parse(message)) => {
                    return if message.trim().is_empty() {
                        Verdict::Violation("a parse error without a message".into())
                    } else {
                        Verdict::Refused("parse".into())
                    };
                }
                Err(ManifestError::Field { field, problem }) => {
                    return if problem.is_empty() {
                        Verdict::Violation(format!("field {field} refused without a reason"))
                    } else {
                        Verdict::Refused(format!("field:{field}"))
                    };
                }
                Err(other) => return Verdict::Refused(format!("other:{other}")),
                Ok(m) => m,
            };
            if let Err(why) = manifest_invariants(&manifest) {
                return Verdict::Violation(why);
            }
            if !input.load {
                return Verdict::Accepted("accepted".into());
            }
            loads += 1;
            let loaded = ModelPackage::from_parts(&input.text, DEMO_ONNX)
                .and_then(|p| Model::load(&p, None));
            match loaded {
                Ok(model) => match model.infer(&vec![0.0; model.input_len()]) {
                    Ok(raw) if raw.len() == model.classes().len() => {
                        Verdict::Accepted("accepted+loaded".into())
                    }
                    other => Verdict::Violation(format!(
                        "a loaded model's first inference gave {other:?}"
                    )),
                },
                Err(e) if e.to_string().len() >= 20 => {
                    Verdict::Refused(format!("load:{}", model_error_kind(&e)))
                }
                Err(e) => Verdict::Violation(format!("unclear load error `{e}`")),
            }
        },
        |input| {
            let name = if input.load {
                "load.toml"
            } else {
                "parse.toml"
            };
            (name.to_string(), input.text.clone().into_bytes())
        },
    );
    eprintln!("fuzz manifest: {loads} packages loaded with the demo graph");
    summary.expect_reached("manifest", &["accepted", "parse", "field:", "load:"]);
}

// ---------------------------------------------------------------------------------------------------------
// Target 4: the session opening, as protobuf bytes, through session_plan and the smoother.
// ---------------------------------------------------------------------------------------------------------

const F64_VALUES: [f64; 22] = [
    0.0,
    -0.0,
    1.0,
    -1.0,
    0.5,
    0.6,
    0.4,
    0.95,
    1e-300,
    5e-324,
    f64::MIN_POSITIVE,
    1e308,
    f64::MAX,
    f64::INFINITY,
    f64::NEG_INFINITY,
    f64::NAN,
    33.333,
    300.0,
    1.000_000_1,
    0.999_999_9,
    1e-7,
    2.0,
];

const I32_VALUES: [i32; 12] = [0, 1, 2, 3, 5, 6, 7, 9, 10, 11, -1, i32::MAX];

fn f64_value(rng: &mut Rng) -> f64 {
    if rng.chance(0.7) {
        *pick(rng, &F64_VALUES)
    } else {
        rng.range(-2.0, 1000.0)
    }
}

fn f64_vector(rng: &mut Rng) -> Vec<f64> {
    let n = match rng.below(8) {
        0 => 0,
        1..=3 => 1,
        4..=6 => 4,
        _ => *pick(rng, &[2usize, 3, 5, 1_000]),
    };
    if rng.chance(0.4) && n > 0 {
        vec![1.0 / n as f64; n]
    } else {
        (0..n).map(|_| f64_value(rng)).collect()
    }
}

fn mutate_opening_fields(rng: &mut Rng, o: &mut pb::SessionOpening) {
    for _ in 0..1 + rng.below(4) {
        match rng.below(10) {
            0 => o.model = pick(rng, &["", "phantom-zones", "missing", "\u{0}"]).to_string(),
            1 => o.default_format = *pick(rng, &I32_VALUES),
            2 => o.yuv_matrix = *pick(rng, &I32_VALUES),
            3 => o.yuv_range = *pick(rng, &I32_VALUES),
            4 => {
                o.region = random_region(rng, 64, 48).map(|r| pb::Region {
                    x: r.x,
                    y: r.y,
                    width: r.width,
                    height: r.height,
                })
            }
            5 => {
                use pb::filter_settings::Kind;
                let kind = match rng.below(5) {
                    0 => None,
                    1 => Some(Kind::PassThrough(pb::PassThrough {})),
                    2 => Some(Kind::Exponential(pb::Exponential {
                        tau_ms: f64_value(rng),
                    })),
                    3 => Some(Kind::Window(pb::Window {
                        frames: *pick(rng, &INTERESTING_U32),
                        span_ms: f64_value(rng),
                    })),
                    _ => Some(Kind::Forward(pb::Forward {
                        stay: f64_vector(rng),
                        priors: f64_vector(rng),
                        step_ms: f64_value(rng),
                    })),
                };
                o.filter = Some(pb::FilterSettings { kind });
            }
            6 => {
                o.decision = Some(pb::DecisionSettings {
                    enter: f64_value(rng),
                    exit: f64_value(rng),
                    dwell_ms: f64_value(rng),
                })
            }
            7 => {
                o.quality = Some(pb::QualitySettings {
                    min_focus: f64_value(rng),
                    max_clipped: f64_value(rng),
                })
            }
            8 => {
                o.policy = *pick(rng, &I32_VALUES);
                o.deadline_ms = *pick(rng, &INTERESTING_U32);
            }
            _ => o.source_label = "é".repeat(*pick(rng, &[0usize, 1, 64, 65, 200])),
        }
    }
}

fn mutate_wire_frame(rng: &mut Rng, f: &mut pb::Frame) {
    for _ in 0..1 + rng.below(3) {
        match rng.below(7) {
            0 => f.seq = rng.next_u64(),
            1 => f.capture_time_us = *pick(rng, &[0i64, 1, -1, i64::MIN, i64::MAX, 1 << 40]),
            2 => f.format = *pick(rng, &I32_VALUES),
            3 => f.width = dimension(rng, f.width, 8192),
            4 => f.height = dimension(rng, f.height, 8192),
            5 => f.stride = *pick(rng, &INTERESTING_U32),
            _ => {
                let mut data = f.data.to_vec();
                mutate_bytes(rng, &mut data, &[], &[]);
                f.data = data.into();
            }
        }
    }
}

/// Protobuf tokens: field keys of SessionInput and SessionOpening, extreme varints, group markers.
const PROTO_DICT: [&[u8]; 16] = [
    &[0x0A],
    &[0x12],
    &[0x10],
    &[0x18],
    &[0x2A],
    &[0x32],
    &[0x3A],
    &[0x42],
    &[0x48],
    &[0x50],
    &[0x5A],
    &[0x09, 0, 0, 0, 0, 0, 0, 0xF8, 0x7F],
    &[0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0x01],
    &[
        0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x80, 0x00,
    ],
    &[0x0B],
    &[0x0C],
];

/// Deeply nested protobuf: groups or length-delimited fields inside each other, `depth` levels.
fn nested_protobuf(rng: &mut Rng, depth: usize) -> Vec<u8> {
    if rng.chance(0.5) {
        // Unknown field 15 as a group: start tags, then end tags.
        let mut out = vec![0x7B; depth];
        out.extend(std::iter::repeat_n(0x7C, depth));
        out
    } else {
        // SessionInput.opening (field 1) holding itself as bytes, `depth` times.
        let mut inner: Vec<u8> = Vec::new();
        for _ in 0..depth.min(2_000) {
            let mut outer = vec![0x0A];
            prost::encoding::encode_varint(inner.len() as u64, &mut outer);
            outer.extend_from_slice(&inner);
            inner = outer;
        }
        inner
    }
}

fn mutate_opening_bytes(rng: &mut Rng, corpus: &[(String, Vec<u8>)]) -> Vec<u8> {
    let base = pick(rng, corpus).1.clone();
    match rng.below(10) {
        0..=3 => {
            let mut d = base;
            let donor = pick(rng, corpus).1.clone();
            mutate_bytes(rng, &mut d, &donor, &PROTO_DICT);
            d
        }
        4..=7 => {
            let mut input = pb::SessionInput::decode(&base[..]).unwrap_or_default();
            match &mut input.item {
                Some(pb::session_input::Item::Frame(f)) if rng.chance(0.8) => {
                    mutate_wire_frame(rng, f)
                }
                _ => {
                    let mut o = match input.item {
                        Some(pb::session_input::Item::Opening(o)) => o,
                        _ => pb::SessionOpening::default(),
                    };
                    mutate_opening_fields(rng, &mut o);
                    input.item = Some(pb::session_input::Item::Opening(o));
                }
            }
            let mut d = input.encode_to_vec();
            if rng.chance(0.2) {
                mutate_bytes(rng, &mut d, &[], &PROTO_DICT);
            }
            d
        }
        8 => {
            let depth = *pick(rng, &[50usize, 99, 100, 101, 1_000, 100_000]);
            nested_protobuf(rng, depth)
        }
        _ => (0..rng.below(256)).map(|_| rng.next_u64() as u8).collect(),
    }
}

fn hash_bytes(d: &[u8]) -> u64 {
    d.iter().fold(0xCBF2_9CE4_8422_2325u64, |h, &b| {
        (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01B3)
    })
}

/// An opening through the server's checks, then a run of the smoother it sets up.
fn check_opening(o: &pb::SessionOpening, model: &Model, seed: u64) -> Result<String, String> {
    let plan = match convert::session_plan(o, model, DEFAULT_FRAME_LIMITS) {
        Err(e) if e.field.is_empty() || e.problem.is_empty() => {
            return Err(format!("unclear opening error `{e}`"));
        }
        Err(e) => return Ok(format!("refused:{}", e.field)),
        Ok(plan) => plan,
    };
    let classes = model.classes().len();
    let mut smoother = Smoother::new(&plan.settings, classes)
        .map_err(|e| format!("session_plan accepted settings the smoother refuses: {e}"))?;
    // The settings echoed in SessionAccepted, sent back, must give the same plan.
    let echoed = convert::wire_settings(&plan, &model.identity().name);
    let again = convert::session_plan(&echoed, model, DEFAULT_FRAME_LIMITS)
        .map_err(|e| format!("the echoed settings are refused: {e}"))?;
    if format!("{:?}", again.settings) != format!("{:?}", plan.settings)
        || again.policy != plan.policy
        || again.default_format != plan.default_format
        || again.deadline_us != plan.deadline_us
    {
        return Err(format!(
            "the echoed settings differ: {:?} then {:?}",
            plan.settings, again.settings
        ));
    }
    let mut rng = Rng::new(seed);
    let mut t_us: i64 = rng.below(1 << 40) as i64;
    for _ in 0..16 {
        t_us = match rng.below(8) {
            0 => t_us.saturating_sub(rng.below(1_000_000) as i64),
            1 => *pick(&mut rng, &[i64::MIN, i64::MAX, 0, -1, 1]),
            2 => t_us,
            _ => t_us.saturating_add(rng.below(200_000) as i64),
        };
        let logits: Vec<f32> = (0..classes)
            .map(|_| rng.range(-20.0, 20.0) as f32)
            .collect();
        let raw = framewise_engine::model::softmax(&logits);
        let quality = QualityMeasures {
            focus: rng.range(0.0, 500.0),
            dark_share: rng.unit(),
            bright_share: rng.unit(),
        };
        // The server's time base: capture microseconds as milliseconds (session.rs).
        let s = smoother.smooth(t_us as f64 / 1000.0, &raw, &quality);
        let fine = s.smoothed.is_empty()
            || (s.smoothed.len() == classes
                && s.smoothed
                    .iter()
                    .all(|p| p.is_finite() && (-1e-5..=1.0 + 1e-5).contains(p)));
        if !fine {
            return Err(format!(
                "filter {:?} gave {:?} at t = {t_us} us",
                plan.settings.filter, s.smoothed
            ));
        }
        if let Decision::Class { index, confidence } = s.decision
            && (index >= classes || !confidence.is_finite())
        {
            return Err(format!("decision {:?}", s.decision));
        }
    }
    Ok(format!("accepted:{}", plan.settings.filter.name()))
}

/// A frame as the server reads it after an opening without a default format.
fn check_wire_frame(f: &pb::Frame) -> Result<String, String> {
    let format = match convert::pixel_format(f.format) {
        Err(_) => return Ok("frame:bad_format".into()),
        Ok(None) => return Ok("frame:no_format".into()),
        Ok(Some(format)) => format,
    };
    let frame = FrameRef {
        format,
        width: f.width,
        height: f.height,
        stride: f.stride,
        data: &f.data,
    };
    let mut scratch = DecodeScratch::default();
    let mut out = RgbImage::default();
    let (result, usage) = metered(|| {
        frame::to_rgb(
            &frame,
            None,
            YuvSpec::default(),
            &DEFAULT_FRAME_LIMITS,
            &mut scratch,
            &mut out,
        )
    });
    let bound = if format.is_encoded() {
        encoded_bound(&DEFAULT_FRAME_LIMITS, f.data.len())
    } else {
        4 * f.data.len() + (64 << 10)
    };
    if usage.largest > bound {
        return Err(format!(
            "a {} byte frame allocated {} bytes at once",
            f.data.len(),
            usage.largest
        ));
    }
    check_conversion(&result, &out, None, &DEFAULT_FRAME_LIMITS).map(|k| format!("frame:{k}"))
}

#[test]
fn fuzz_session_opening() {
    let corpus = corpus_files("opening");
    let model = demo_model();
    let summary = fuzz(
        "opening",
        150_000,
        &corpus,
        mutate_opening_bytes,
        |bytes: &Vec<u8>| {
            let seed = hash_bytes(bytes);
            let as_input = match pb::SessionInput::decode(&bytes[..]) {
                Err(e) if e.to_string().is_empty() => {
                    return Verdict::Violation("a decode error without a message".into());
                }
                Err(_) => Ok("input:decode_error".to_string()),
                Ok(input) => match &input.item {
                    Some(pb::session_input::Item::Opening(o)) => check_opening(o, &model, seed),
                    Some(pb::session_input::Item::Frame(f)) => check_wire_frame(f),
                    None => Ok("input:empty".into()),
                },
            };
            let as_opening = match pb::SessionOpening::decode(&bytes[..]) {
                Err(_) => Ok("decode_error".to_string()),
                Ok(o) => check_opening(&o, &model, seed),
            };
            match (as_input, as_opening) {
                (Ok(a), Ok(b)) => Verdict::Accepted(format!("{a} / {b}")),
                (Err(why), _) | (_, Err(why)) => Verdict::Violation(why),
            }
        },
        |bytes| ("input.pb".to_string(), bytes.clone()),
    );
    summary.expect_reached(
        "opening",
        &[
            "input:decode_error",
            "accepted:forward",
            "accepted:window",
            "accepted:exponential",
            "refused:forward.stay",
            "refused:decision.exit",
            "frame:accepted",
        ],
    );
}

// ---------------------------------------------------------------------------------------------------------
// Target 5: recordings the client replays: Y4M files and a folder's labels.csv.
// ---------------------------------------------------------------------------------------------------------

const Y4M_DICT: [&[u8]; 12] = [
    b"YUV4MPEG2 ",
    b"FRAME\n",
    b" W",
    b" H",
    b" F",
    b" C420jpeg",
    b" C422",
    b" C444",
    b" Ip",
    b" A1:1",
    b"\n",
    b" ",
];

const Y4M_VALUES: [(&str, &[&str]); 4] = [
    (
        "W",
        &[
            "0",
            "1",
            "2",
            "7",
            "8",
            "16384",
            "16385",
            "4294967295",
            "4294967296",
            "-1",
            "",
            "08",
            "1e3",
            "８",
        ],
    ),
    (
        "H",
        &[
            "0",
            "1",
            "2",
            "5",
            "6",
            "16384",
            "16385",
            "4294967295",
            "-1",
            "",
            "+6",
        ],
    ),
    (
        "F",
        &[
            "30:1",
            "0:1",
            "1:0",
            "0:0",
            "30000:1001",
            "4294967295:1",
            "1:4294967295",
            "x",
            ":",
            "30",
            "25:",
        ],
    ),
    (
        "C",
        &[
            "420", "420jpeg", "420paldv", "420mpeg2", "422", "444", "444alpha", "mono", "411",
            "420p10", "444p16", "", "4", "42", "422p", "é",
        ],
    ),
];

fn mutate_y4m_header(rng: &mut Rng, d: &mut Vec<u8>) {
    let end = d.iter().position(|&b| b == b'\n').unwrap_or(d.len());
    let mut tokens: Vec<Vec<u8>> = d[..end].split(|&b| b == b' ').map(<[u8]>::to_vec).collect();
    match rng.below(7) {
        0..=3 => {
            let (tag, values) = Y4M_VALUES[index(rng, Y4M_VALUES.len())];
            let mut token = tag.as_bytes().to_vec();
            token.extend_from_slice(pick(rng, values).as_bytes());
            match tokens.iter().position(|t| t.starts_with(tag.as_bytes())) {
                Some(i) if rng.chance(0.8) => tokens[i] = token,
                _ => tokens.push(token),
            }
        }
        4 => {
            let token: Vec<u8> = match rng.below(4) {
                0 => "\u{FFFD}x".as_bytes().to_vec(),
                1 => vec![0xFF, 0xFE],
                2 => vec![0xC3],
                _ => format!(
                    "{}{}",
                    *pick(rng, &["é", "Ｗ", "X", "I", "A", "\t"]),
                    rng.below(100)
                )
                .into_bytes(),
            };
            tokens.insert(index(rng, tokens.len() + 1), token);
        }
        5 if !tokens.is_empty() => {
            tokens.remove(index(rng, tokens.len()));
        }
        _ => {
            if end < d.len() {
                d.remove(end);
            }
            return;
        }
    }
    let header = tokens.join(&b' ');
    d.splice(..end, header);
}

fn mutate_y4m(rng: &mut Rng, corpus: &[(String, Vec<u8>)]) -> Vec<u8> {
    let mut d = pick(rng, corpus).1.clone();
    for _ in 0..1 + rng.below(3) {
        match rng.below(7) {
            0..=2 => mutate_y4m_header(rng, &mut d),
            3 => {
                let frames: Vec<usize> = d
                    .windows(5)
                    .enumerate()
                    .filter(|(_, w)| w == b"FRAME")
                    .map(|(i, _)| i)
                    .collect();
                if let Some(&at) = frames.get(index(rng, frames.len().max(1))) {
                    match rng.below(4) {
                        0 => {
                            d.splice(at + 5..at + 5, b" Ixyz".iter().copied());
                        }
                        1 => {
                            if let Some(nl) = d[at..].iter().position(|&b| b == b'\n') {
                                d.remove(at + nl);
                            }
                        }
                        2 => d[at + 4] = b'X',
                        _ => {
                            let n = 1 + index(rng, 4);
                            d.splice(at..at, std::iter::repeat_n(b'#', n));
                        }
                    }
                }
            }
            4 => {
                let donor = pick(rng, corpus).1.clone();
                mutate_bytes(rng, &mut d, &donor, &Y4M_DICT);
            }
            5 => {
                let n = d.len();
                d.truncate(index(rng, n + 1));
            }
            _ => {
                d.extend_from_slice(b"FRAME\n");
                let n = index(rng, 200);
                d.extend((0..n).map(|_| rng.next_u64() as u8));
            }
        }
    }
    d
}

/// Bytes of one Y4M frame's planes (the YUV4MPEG2 layout: chroma planes of ceil(w / 2) columns for 4:2:x
/// and ceil(h / 2) rows for 4:2:0).
fn y4m_frame_len(format: PixelFormat, width: u32, height: u32) -> usize {
    let (w, h) = (width as usize, height as usize);
    match format {
        PixelFormat::I420 => w * h + 2 * w.div_ceil(2) * h.div_ceil(2),
        PixelFormat::I422 => w * h + 2 * w.div_ceil(2) * h,
        _ => 3 * w * h,
    }
}

/// A recording through the client's reader: the frames it lists, each read and converted by the engine.
fn open_recording(path: &Path, frames: usize) -> Result<Result<String, String>, String> {
    let recording = match Recording::open(path) {
        Ok(r) => r,
        Err(e) => {
            let text = format!("{e:#}");
            return if text.len() < 15 {
                Err(format!("unclear error `{text}`"))
            } else {
                Ok(Err(message_kind(&text, path)))
            };
        }
    };
    let mut kinds = BTreeSet::new();
    for entry in recording.frames.iter().take(frames) {
        if !entry.timestamp_ms.is_finite() || entry.label.as_deref() == Some("") {
            return Err(format!("entry {entry:?}"));
        }
        let data = recording
            .read(entry)
            .map_err(|e| format!("a listed frame cannot be read: {e:#}"))?;
        if data.width > 0 && data.data.len() != y4m_frame_len(data.format, data.width, data.height)
        {
            return Err(format!(
                "a {} frame of {}x{} holds {} bytes",
                data.format,
                data.width,
                data.height,
                data.data.len()
            ));
        }
        let frame = FrameRef {
            format: data.format,
            width: data.width,
            height: data.height,
            stride: 0,
            data: &data.data,
        };
        let mut scratch = DecodeScratch::default();
        let mut out = RgbImage::default();
        let result = frame::to_rgb(
            &frame,
            None,
            YuvSpec::default(),
            &DEFAULT_FRAME_LIMITS,
            &mut scratch,
            &mut out,
        );
        kinds.insert(check_conversion(
            &result,
            &out,
            None,
            &DEFAULT_FRAME_LIMITS,
        )?);
    }
    let warned = if recording.warnings.is_empty() {
        ""
    } else {
        "+warnings"
    };
    Ok(Ok(format!(
        "opened{warned}:{}",
        kinds.into_iter().collect::<Vec<_>>().join(",")
    )))
}

#[test]
fn fuzz_y4m_reading() {
    let corpus = corpus_files("y4m");
    let dir = scratch("y4m");
    let path = dir.join("input.y4m");
    let summary = fuzz(
        "y4m",
        15_000,
        &corpus,
        mutate_y4m,
        |bytes: &Vec<u8>| {
            if let Err(e) = std::fs::write(&path, bytes) {
                return Verdict::Violation(format!("writing the scratch file: {e}"));
            }
            let (outcome, usage) = metered(|| open_recording(&path, 4));
            // Frames are read only when the file holds them: memory follows the file's size.
            let bound = 4 * bytes.len() + (1 << 20);
            if usage.largest > bound {
                return Verdict::Violation(format!(
                    "a {} byte file allocated {} bytes at once",
                    bytes.len(),
                    usage.largest
                ));
            }
            match outcome {
                Ok(Ok(kind)) => Verdict::Accepted(kind),
                Ok(Err(kind)) => Verdict::Refused(kind),
                Err(why) => Verdict::Violation(why),
            }
        },
        |bytes| ("input.y4m".to_string(), bytes.clone()),
    );
    let _ = std::fs::remove_dir_all(&dir);
    summary.expect_reached(
        "Y4M",
        &[
            "opened:accepted",
            "opened+warnings",
            "not a Y#M file",
            "is not usable",
            "colour space <value> is not supported",
        ],
    );
}

const CSV_DICT: [&[u8]; 18] = [
    b",",
    b"\n",
    b"\r\n",
    b"#",
    b"file,timestamp_ms,label\n",
    b"frame_000.png",
    b"frame_001.png",
    b"frame_002.jpg",
    b"nan",
    b"inf",
    b"-inf",
    b"1e400",
    b"-0",
    b"0x10",
    b"\xEF\xBB\xBF",
    b"\"",
    b"\t",
    b"\xFF",
];

const CSV_FIELDS: [&str; 14] = [
    "",
    " ",
    "frame_000.png",
    "frame_002.jpg",
    "FRAME_000.PNG",
    "nan",
    "NaN",
    "inf",
    "-1e400",
    "1e400",
    "-5",
    "33.3",
    "plain",
    "a,b",
];

fn mutate_labels(rng: &mut Rng, corpus: &[(String, Vec<u8>)]) -> Vec<u8> {
    let mut d = pick(rng, corpus).1.clone();
    for _ in 0..1 + rng.below(3) {
        match rng.below(4) {
            0 | 1 => {
                let donor = pick(rng, corpus).1.clone();
                mutate_bytes(rng, &mut d, &donor, &CSV_DICT);
            }
            2 => {
                let text = String::from_utf8_lossy(&d).into_owned();
                let mut lines: Vec<String> = text.lines().map(str::to_string).collect();
                if !lines.is_empty() {
                    let i = index(rng, lines.len());
                    let mut fields: Vec<String> = lines[i].split(',').map(str::to_string).collect();
                    let f = index(rng, fields.len() + 1);
                    let value = pick(rng, &CSV_FIELDS).to_string();
                    if f < fields.len() {
                        fields[f] = value;
                    } else {
                        fields.push(value);
                    }
                    lines[i] = fields.join(",");
                }
                d = lines
                    .join(if rng.chance(0.2) { "\r\n" } else { "\n" })
                    .into_bytes();
            }
            _ => {
                let line = format!(
                    "{},{},{}\n",
                    pick(rng, &CSV_FIELDS),
                    pick(rng, &CSV_FIELDS),
                    pick(rng, &CSV_FIELDS)
                );
                let at = index(rng, d.len() + 1);
                d.splice(at..at, line.into_bytes());
            }
        }
    }
    d
}

#[test]
fn fuzz_recording_labels_csv() {
    let corpus = corpus_files("recording");
    let dir = scratch("recording");
    let encoded = corpus_dir("encoded");
    for (name, source) in [
        ("frame_000.png", "phantom-64x48.png"),
        ("frame_001.png", "gray-32x24.png"),
        ("frame_002.jpg", "phantom-64x48.jpg"),
    ] {
        std::fs::copy(encoded.join(source), dir.join(name)).expect("copy a corpus frame");
    }
    let labels = dir.join("labels.csv");
    let summary = fuzz(
        "recording",
        10_000,
        &corpus,
        mutate_labels,
        |bytes: &Vec<u8>| {
            if let Err(e) = std::fs::write(&labels, bytes) {
                return Verdict::Violation(format!("writing the scratch file: {e}"));
            }
            let (outcome, usage) = metered(|| open_recording(&dir, 3));
            let bound = 64 * bytes.len() + (1 << 20);
            if usage.largest > bound {
                return Verdict::Violation(format!(
                    "a {} byte labels.csv allocated {} bytes at once",
                    bytes.len(),
                    usage.largest
                ));
            }
            match outcome {
                Ok(Ok(kind)) => Verdict::Accepted(kind),
                Ok(Err(kind)) => Verdict::Refused(kind),
                Err(why) => Verdict::Violation(why),
            }
        },
        |bytes| ("labels.csv".to_string(), bytes.clone()),
    );
    let _ = std::fs::remove_dir_all(&dir);
    summary.expect_reached(
        "labels",
        &[
            "opened:accepted",
            "opened+warnings:accepted",
            "reading <file>",
        ],
    );
}

// ---------------------------------------------------------------------------------------------------------
// Broken model packages: truncated and bit-flipped graphs, and a registry with one broken package.
// ---------------------------------------------------------------------------------------------------------

/// Loads the demo manifest with `onnx`: Ok(kind) for a clean outcome, Err(why) for a panic or an unclear one.
fn load_outcome(onnx: &[u8]) -> Result<String, String> {
    let outcome = guarded(|| {
        let package = ModelPackage::from_parts(DEMO_MANIFEST, onnx.to_vec())?;
        let model = Model::load(&package, None)?;
        Ok::<_, ModelError>(
            model
                .infer(&vec![0.5; model.input_len()])
                .map(|raw| raw.len()),
        )
    });
    match outcome {
        Err(panic) => Err(panic),
        Ok(Ok(Ok(4))) => Ok("loaded".into()),
        Ok(Ok(Ok(n))) => Err(format!("a loaded model answered {n} values for 4 classes")),
        Ok(Ok(Err(e))) => Ok(format!(
            "loaded, inference refused: {}",
            message_kind(&e.to_string(), Path::new("/"))
        )),
        Ok(Err(e)) => {
            let text = e.to_string();
            if text.len() < 20 {
                Err(format!("unclear refusal `{text}`"))
            } else {
                Ok(model_error_kind(&e))
            }
        }
    }
}

fn save_model_failure(name: &str, onnx: &[u8], why: &str) -> String {
    let dir = workspace_root().join("target/fuzz-crashes/models");
    let _ = std::fs::create_dir_all(&dir);
    let path = dir.join(format!("{name}.onnx"));
    let _ = std::fs::write(&path, onnx);
    let _ = std::fs::write(path.with_extension("txt"), why);
    format!("{name}: {why} (saved to {})", path.display())
}

#[test]
fn truncated_model_files_are_refused_at_every_cut_point() {
    let _ = contained_panics();
    let n = DEMO_ONNX.len();
    let mut cuts: BTreeSet<usize> = (0..64).collect();
    cuts.extend((0..=200).map(|i| i * n / 200));
    cuts.extend((1..=64).map(|k| n - k));
    cuts.remove(&n);
    let started = Instant::now();
    let mut kinds: BTreeMap<String, u32> = BTreeMap::new();
    let mut failures = Vec::new();
    for &cut in &cuts {
        let t0 = Instant::now();
        match load_outcome(&DEMO_ONNX[..cut]) {
            Ok(kind) => *kinds.entry(kind).or_default() += 1,
            Err(why) => failures.push(save_model_failure(
                &format!("truncated-{cut}"),
                &DEMO_ONNX[..cut],
                &why,
            )),
        }
        if t0.elapsed() > HANG_LIMIT {
            failures.push(format!("cut at {cut}: {:.1} s", t0.elapsed().as_secs_f64()));
        }
    }
    eprintln!(
        "truncated models: {} cut points of {n} bytes in {:.1} s: {kinds:?}; panics caught inside \
         framewise's own code: {}",
        cuts.len(),
        started.elapsed().as_secs_f64(),
        contained_panics()
    );
    assert!(failures.is_empty(), "{}", failures.join("\n"));
    // A model cut short anywhere before its last bytes is refused: the graph or its weights are incomplete.
    let loaded = kinds.get("loaded").copied().unwrap_or(0);
    assert!(
        loaded <= 64,
        "{loaded} truncated files loaded; only cuts inside the trailing metadata may"
    );
}

#[test]
fn bit_flipped_model_files_load_or_are_refused_cleanly() {
    let _ = contained_panics();
    let budget = Budget::from_env(600);
    let n = DEMO_ONNX.len();
    let started = Instant::now();
    let mut kinds: BTreeMap<String, u32> = BTreeMap::new();
    let mut failures = Vec::new();
    // Regressions first: flips (byte offset, XOR mask) that once made the engine panic while loading.
    for (name, text) in corpus_files("models") {
        let mut onnx = DEMO_ONNX.to_vec();
        for line in String::from_utf8_lossy(&text).lines() {
            let line = line.trim();
            if line.is_empty() || line.starts_with('#') {
                continue;
            }
            let (at, mask) = line.split_once(' ').expect("offset and mask");
            let at: usize = at.parse().expect("offset");
            let mask = u8::from_str_radix(mask.trim_start_matches("0x"), 16).expect("mask");
            onnx[at] ^= mask;
        }
        match load_outcome(&onnx) {
            Ok(kind) => {
                eprintln!("bit-flipped models: regression {name}: {kind}");
                *kinds.entry(kind).or_default() += 1;
            }
            Err(why) => failures.push(save_model_failure(&name, &onnx, &why)),
        }
    }
    let mut i = 0;
    while budget.more(i, started) && failures.len() < MAX_FAILURES {
        let seed = budget.seed_of("models", i);
        let mut rng = Rng::new(seed);
        let mut onnx = DEMO_ONNX.to_vec();
        for _ in 0..1 + rng.below(4) {
            // Half the flips hit the graph's structure (nodes first, inputs and outputs last), half anywhere.
            let at = match rng.below(4) {
                0 => index(&mut rng, 2048.min(n)),
                1 => n - 1 - index(&mut rng, 2048.min(n)),
                _ => index(&mut rng, n),
            };
            onnx[at] ^= 1 << rng.below(8);
        }
        let t0 = Instant::now();
        match load_outcome(&onnx) {
            Ok(kind) => *kinds.entry(kind).or_default() += 1,
            Err(why) => failures.push(save_model_failure(
                &format!("flipped-{seed:016x}"),
                &onnx,
                &why,
            )),
        }
        if t0.elapsed() > HANG_LIMIT {
            failures.push(save_model_failure(
                &format!("flipped-{seed:016x}"),
                &onnx,
                &format!("took {:.1} s", t0.elapsed().as_secs_f64()),
            ));
        }
        i += 1;
    }
    eprintln!(
        "bit-flipped models: {i} files in {:.1} s: {kinds:?}; panics caught inside framewise's own \
         code: {}",
        started.elapsed().as_secs_f64(),
        contained_panics()
    );
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// A package folder holding the demo manifest and `onnx`.
fn write_package(dir: &Path, onnx: &[u8]) -> PathBuf {
    framewise_models_demo::package::write_demo_package(dir).expect("package folder");
    std::fs::write(dir.join("phantom-zones.onnx"), onnx).expect("onnx");
    dir.to_path_buf()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_broken_package_beside_a_good_one_is_reported_by_path_and_refused_when_strict() {
    use framewise_server::config::ModelEntry;
    use framewise_server::{ModelRegistry, ServerConfig};
    let dir = scratch("registry");
    let good = write_package(&dir.join("good"), DEMO_ONNX);
    let truncated = write_package(&dir.join("truncated"), &DEMO_ONNX[..DEMO_ONNX.len() / 2]);
    let pinned = write_package(&dir.join("pinned"), DEMO_ONNX);
    let entry = |path: &PathBuf, sha256: Option<String>| ModelEntry {
        path: path.clone(),
        sha256,
        engine: None,
    };
    let config = ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        models: vec![
            entry(&good, None),
            entry(&truncated, None),
            entry(&pinned, Some("ab".repeat(32))),
        ],
        demo_model: false,
        workers: 1,
        ..ServerConfig::default()
    };
    let loaded = {
        let config = config.clone();
        tokio::task::spawn_blocking(move || ModelRegistry::load(&config))
            .await
            .expect("loading runs")
    };
    let (registry, failures) =
        loaded.unwrap_or_else(|f| panic!("non-strict loading failed: {} {}", f.source, f.error));
    let names: Vec<&str> = registry
        .all()
        .iter()
        .map(|m| m.identity().name.as_str())
        .collect();
    assert_eq!(names, ["phantom-zones"], "the good package is served");
    let reported: Vec<(String, String)> = failures
        .iter()
        .map(|f| (f.source.clone(), f.error.to_string()))
        .collect();
    assert_eq!(reported.len(), 2, "{reported:?}");
    assert_eq!(reported[0].0, truncated.display().to_string());
    assert!(
        reported[0].1.contains("ONNX file is not a readable model"),
        "{}",
        reported[0].1
    );
    assert_eq!(reported[1].0, pinned.display().to_string());
    assert!(
        reported[1].1.contains("SHA-256") && reported[1].1.contains(&"ab".repeat(32)),
        "{}",
        reported[1].1
    );

    // The server itself: non-strict serves the good model, strict refuses to start naming the path.
    let server = framewise_server::start(config.clone(), None)
        .await
        .expect("non-strict server starts");
    let mut client =
        pb::frame_analysis_client::FrameAnalysisClient::connect(format!("http://{}", server.addr))
            .await
            .expect("connects");
    let listed = client
        .list_model_cards(pb::ModelCardsRequest {})
        .await
        .expect("lists")
        .into_inner();
    let served: Vec<String> = listed
        .models
        .iter()
        .filter_map(|m| m.identity.as_ref().map(|i| i.name.clone()))
        .collect();
    assert_eq!(served, ["phantom-zones"]);
    server.stop().await.expect("stops");

    let strict = ServerConfig {
        strict_models: true,
        ..config
    };
    let refused = {
        let strict = strict.clone();
        tokio::task::spawn_blocking(move || ModelRegistry::load(&strict))
            .await
            .expect("loading runs")
    };
    match refused {
        Ok(_) => panic!("strict loading accepted a broken package"),
        Err(f) => assert_eq!(f.source, truncated.display().to_string()),
    }
    match framewise_server::start(strict, None).await {
        Ok(_) => panic!("a strict server started with a broken package"),
        Err(e) => {
            let text = format!("{e:#}");
            assert!(text.contains(&truncated.display().to_string()), "{text}");
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
}

// ---------------------------------------------------------------------------------------------------------
// Malformed protobuf and gRPC framing over the wire, against an in-process server.
// ---------------------------------------------------------------------------------------------------------

/// A gRPC codec that sends and receives message bodies as raw bytes.
#[derive(Debug, Clone, Copy, Default)]
struct RawCodec;

struct RawEncoder;

struct RawDecoder;

impl tonic::codec::Encoder for RawEncoder {
    type Item = Vec<u8>;
    type Error = tonic::Status;

    fn encode(
        &mut self,
        item: Vec<u8>,
        dst: &mut tonic::codec::EncodeBuf<'_>,
    ) -> Result<(), tonic::Status> {
        use prost::bytes::BufMut;
        dst.put_slice(&item);
        Ok(())
    }
}

impl tonic::codec::Decoder for RawDecoder {
    type Item = Vec<u8>;
    type Error = tonic::Status;

    fn decode(
        &mut self,
        src: &mut tonic::codec::DecodeBuf<'_>,
    ) -> Result<Option<Vec<u8>>, tonic::Status> {
        use prost::bytes::Buf;
        let mut out = vec![0; src.remaining()];
        src.copy_to_slice(&mut out);
        Ok(Some(out))
    }
}

impl tonic::codec::Codec for RawCodec {
    type Encode = Vec<u8>;
    type Decode = Vec<u8>;
    type Encoder = RawEncoder;
    type Decoder = RawDecoder;

    fn encoder(&mut self) -> RawEncoder {
        RawEncoder
    }

    fn decoder(&mut self) -> RawDecoder {
        RawDecoder
    }
}

const RUN_SESSION: &str = "/framewise.v1.FrameAnalysis/RunSession";

/// Sends raw message bodies on one RunSession stream; the status it ended with (OK after a summary).
async fn run_session_raw(
    channel: &tonic::transport::Channel,
    messages: Vec<Vec<u8>>,
) -> Result<tonic::Code, String> {
    let mut grpc = tonic::client::Grpc::new(channel.clone());
    grpc.ready().await.map_err(|e| format!("not ready: {e}"))?;
    let path = tonic::codegen::http::uri::PathAndQuery::from_static(RUN_SESSION);
    let request = tonic::Request::new(tokio_stream::iter(messages));
    let run = async {
        let mut answers = match grpc.streaming(request, path, RawCodec).await {
            Ok(r) => r.into_inner(),
            Err(status) => return status.code(),
        };
        loop {
            match answers.message().await {
                Ok(Some(body)) => {
                    if pb::SessionOutput::decode(&body[..]).is_err() {
                        return tonic::Code::DataLoss;
                    }
                }
                Ok(None) => return tonic::Code::Ok,
                Err(status) => return status.code(),
            }
        }
    };
    tokio::time::timeout(Duration::from_secs(10), run)
        .await
        .map_err(|_| "no end within 10 s".to_string())
}

/// Sends a hand-made request body (gRPC framing included) on RunSession; the status the server answered.
async fn run_session_framed(
    channel: &tonic::transport::Channel,
    body: String,
) -> Result<tonic::Code, String> {
    use tonic::codegen::{Body as _, Service as _};
    let mut channel = channel.clone();
    let request = tonic::codegen::http::Request::builder()
        .method("POST")
        .uri(RUN_SESSION)
        .header("content-type", "application/grpc")
        .header("te", "trailers")
        .body(tonic::body::Body::new(body))
        .map_err(|e| e.to_string())?;
    let run = async move {
        std::future::poll_fn(|cx| channel.poll_ready(cx))
            .await
            .map_err(|e| e.to_string())?;
        let response = channel.call(request).await.map_err(|e| e.to_string())?;
        if let Some(status) = tonic::Status::from_header_map(response.headers()) {
            return Ok(status.code());
        }
        let mut body = response.into_body();
        loop {
            let frame =
                std::future::poll_fn(|cx| std::pin::Pin::new(&mut body).poll_frame(cx)).await;
            match frame {
                None => return Err("the response ended without a status".to_string()),
                Some(Err(status)) => return Ok(status.code()),
                Some(Ok(frame)) => {
                    if let Ok(trailers) = frame.into_trailers() {
                        return tonic::Status::from_header_map(&trailers)
                            .map(|s| s.code())
                            .ok_or_else(|| "trailers without a status".to_string());
                    }
                }
            }
        }
    };
    tokio::time::timeout(Duration::from_secs(10), run)
        .await
        .map_err(|_| "no answer within 10 s".to_string())?
}

/// A gRPC message frame: flag, big-endian length, body.
fn grpc_frame(flag: u8, declared: u32, body: &str) -> String {
    let mut out = String::new();
    out.push(char::from(flag));
    for b in declared.to_be_bytes() {
        out.push(char::from(b));
    }
    out.push_str(body);
    out
}

fn valid_opening_bytes() -> Vec<u8> {
    pb::SessionInput {
        item: Some(pb::session_input::Item::Opening(
            pb::SessionOpening::default(),
        )),
    }
    .encode_to_vec()
}

fn valid_frame_bytes(seq: u64) -> Vec<u8> {
    pb::SessionInput {
        item: Some(pb::session_input::Item::Frame(pb::Frame {
            seq,
            format: pb::PixelFormat::Rgb8 as i32,
            width: 8,
            height: 6,
            data: vec![90; 8 * 6 * 3].into(),
            ..Default::default()
        })),
    }
    .encode_to_vec()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn malformed_protobuf_over_the_wire_gets_an_error_status_and_the_server_keeps_serving() {
    use framewise_server::{ModelRegistry, ServerConfig};
    let config = ServerConfig {
        listen: "127.0.0.1:0".parse().expect("addr"),
        workers: 1,
        max_message_bytes: 1 << 20,
        idle_timeout_s: 5.0,
        ..ServerConfig::default()
    };
    let server = framewise_server::start(config, Some(ModelRegistry::new(vec![demo_model()])))
        .await
        .expect("server starts");
    let url = format!("http://{}", server.addr);
    let channel = tonic::transport::Channel::from_shared(url.clone())
        .expect("url")
        .connect()
        .await
        .expect("connects");
    let corpus = corpus_files("opening");
    let budget = Budget::from_env(2_000);
    let started = Instant::now();
    let mut codes: BTreeMap<String, u32> = BTreeMap::new();
    let mut failures = Vec::new();
    // A decode failure of the first message is INTERNAL (the transport's decoder), a wrong message is
    // INVALID_ARGUMENT, an unknown model NOT_FOUND, an oversized one OUT_OF_RANGE; OK when the garbage
    // happened to be a valid session. UNKNOWN, UNAVAILABLE or CANCELLED would mean a handler died.
    let allowed = [
        tonic::Code::Ok,
        tonic::Code::InvalidArgument,
        tonic::Code::Internal,
        tonic::Code::NotFound,
        tonic::Code::OutOfRange,
        tonic::Code::ResourceExhausted,
    ];
    let mut i = 0;
    while budget.more(i, started) && failures.len() < MAX_FAILURES {
        let seed = budget.seed_of("wire", i);
        let mut rng = Rng::new(seed);
        let messages: Vec<Vec<u8>> = match rng.below(4) {
            // Garbage first.
            0 | 1 => (0..1 + rng.below(3))
                .map(|_| mutate_opening_bytes(&mut rng, &corpus))
                .collect(),
            // A valid opening, then garbage frames between valid ones.
            2 => {
                let mut m = vec![valid_opening_bytes(), valid_frame_bytes(1)];
                m.extend((0..1 + rng.below(3)).map(|_| mutate_opening_bytes(&mut rng, &corpus)));
                m.push(valid_frame_bytes(2));
                m
            }
            // Deep nesting.
            _ => {
                let depth = *pick(&mut rng, &[100usize, 101, 10_000, 200_000]);
                vec![nested_protobuf(&mut rng, depth)]
            }
        };
        match run_session_raw(&channel, messages.clone()).await {
            Ok(code) if allowed.contains(&code) => {
                *codes.entry(format!("{code:?}")).or_default() += 1
            }
            outcome => {
                let dir = workspace_root().join("target/fuzz-crashes/wire");
                let _ = std::fs::create_dir_all(&dir);
                for (k, m) in messages.iter().enumerate() {
                    let _ = std::fs::write(dir.join(format!("{seed:016x}-{k}.pb")), m);
                }
                failures.push(format!(
                    "seed {seed:016x}: {outcome:?} (messages saved in {})",
                    dir.display()
                ));
            }
        }
        i += 1;
    }
    // Broken gRPC framing, by hand: compressed flag without an encoding, unknown flags, lengths that lie,
    // a header cut short, a length beyond the server's message limit, an empty stream.
    let opening = String::from_utf8(valid_opening_bytes()).expect("the default opening is ASCII");
    let framing = [
        ("compressed flag, no encoding", grpc_frame(1, 2, "ab")),
        ("unknown flag", grpc_frame(2, 0, "")),
        ("length longer than the body", grpc_frame(0, 0x7F, "abc")),
        ("header cut short", "\u{0}\u{0}\u{0}".to_string()),
        ("length beyond the limit", grpc_frame(0, 0x7F7F_7F7F, "abc")),
        ("empty stream", String::new()),
        (
            "opening then a lying frame",
            format!(
                "{}{}",
                grpc_frame(0, opening.len() as u32, &opening),
                grpc_frame(0, 0x7F, "x")
            ),
        ),
        (
            "opening then garbage",
            format!(
                "{}{}",
                grpc_frame(0, opening.len() as u32, &opening),
                grpc_frame(0, 4, "\u{7}\u{7}\u{7}\u{7}")
            ),
        ),
    ];
    for (what, body) in framing {
        match run_session_framed(&channel, body).await {
            Ok(code) if allowed.contains(&code) => {
                *codes.entry(format!("framing {code:?}")).or_default() += 1
            }
            outcome => failures.push(format!("{what}: {outcome:?}")),
        }
    }
    // A normal session still works, on the same connection and on a new one.
    for fresh in [false, true] {
        let channel = if fresh {
            tonic::transport::Channel::from_shared(url.clone())
                .expect("url")
                .connect()
                .await
                .expect("connects")
        } else {
            channel.clone()
        };
        let mut grpc = tonic::client::Grpc::new(channel);
        grpc.ready().await.expect("ready");
        let messages = vec![
            valid_opening_bytes(),
            valid_frame_bytes(1),
            valid_frame_bytes(2),
            valid_frame_bytes(3),
        ];
        let path = tonic::codegen::http::uri::PathAndQuery::from_static(RUN_SESSION);
        let mut answers = grpc
            .streaming(
                tonic::Request::new(tokio_stream::iter(messages)),
                path,
                RawCodec,
            )
            .await
            .expect("a normal session opens")
            .into_inner();
        let mut results = 0;
        let mut summary = false;
        while let Some(body) = answers.message().await.expect("a normal session ends well") {
            match pb::SessionOutput::decode(&body[..])
                .expect("server output decodes")
                .item
            {
                Some(pb::session_output::Item::Answer(a)) => {
                    results +=
                        usize::from(matches!(a.outcome, Some(pb::answer::Outcome::Result(_))));
                }
                Some(pb::session_output::Item::Summary(_)) => summary = true,
                _ => {}
            }
        }
        assert!(
            results == 3 && summary,
            "after the garbage: {results} results, summary {summary}"
        );
    }
    let deadline = Instant::now() + Duration::from_secs(5);
    while server.stats.sessions_open.load(Ordering::Relaxed) > 0 && Instant::now() < deadline {
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let open = server.stats.sessions_open.load(Ordering::Relaxed);
    eprintln!(
        "wire: {i} garbage sessions and 8 broken framings in {:.1} s: {codes:?}; sessions left open: {open}",
        started.elapsed().as_secs_f64()
    );
    assert!(failures.is_empty(), "{}", failures.join("\n"));
    assert_eq!(open, 0, "every garbage session was closed");
    assert!(
        codes.contains_key("Internal") && codes.contains_key("InvalidArgument"),
        "{codes:?}"
    );
    server.stop().await.expect("stops");
}

// ---------------------------------------------------------------------------------------------------------
// Secrets never reach the logs: the real server binary at debug level.
// ---------------------------------------------------------------------------------------------------------

/// Standard base64 (RFC 4648, section 4), without padding.
fn base64(data: &[u8]) -> String {
    const ALPHABET: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut out = String::new();
    for chunk in data.chunks(3) {
        let b = [
            chunk[0],
            *chunk.get(1).unwrap_or(&0),
            *chunk.get(2).unwrap_or(&0),
        ];
        let n = (u32::from(b[0]) << 16) | (u32::from(b[1]) << 8) | u32::from(b[2]);
        for k in 0..=chunk.len() {
            out.push(char::from(ALPHABET[(n >> (18 - 6 * k)) as usize & 63]));
        }
    }
    out
}

/// The forms a secret could take in a log: raw, hex, base64 at each alignment, decimal bytes.
fn secret_forms(secret: &[u8]) -> Vec<String> {
    let mut forms = vec![
        String::from_utf8_lossy(secret).into_owned(),
        secret.iter().map(|b| format!("{b:02x}")).collect(),
        secret.iter().map(|b| format!("{b:02X}")).collect(),
        secret[..8]
            .iter()
            .map(|b| b.to_string())
            .collect::<Vec<_>>()
            .join(", "),
    ];
    for shift in 0..3 {
        // The middle of the encoding does not depend on the bytes around the secret.
        let encoded = base64(&secret[shift..]);
        forms.push(encoded[1..encoded.len() - 2].to_string());
        forms.push(
            encoded[1..encoded.len() - 2]
                .replace('+', "-")
                .replace('/', "_"),
        );
    }
    forms
}

fn strip_ansi(text: &str) -> String {
    let mut out = String::new();
    let mut chars = text.chars();
    while let Some(c) = chars.next() {
        if c == '\u{1b}' {
            for d in chars.by_ref() {
                if d.is_ascii_alphabetic() {
                    break;
                }
            }
        } else {
            out.push(c);
        }
    }
    out
}

#[test]
fn secrets_never_reach_the_logs() {
    use std::io::Read;
    use std::process::{Command, Stdio};
    const TOKEN: &str = "fwTokenQ7x9Zr2mK4pL8vN3b";
    const WRONG: &str = "fwWrongJ5k6TyU1iO0pA9dS2";
    const PATTERN: &[u8] = b"QZPIXELSECRETPATTERN\x8f\x01\xfe";
    assert_eq!((TOKEN.len(), WRONG.len()), (24, 24));
    let mut child = Command::new(framewise_tests::binary("framewise-server"))
        .args([
            "--listen",
            "127.0.0.1:0",
            "--token",
            TOKEN,
            "--workers",
            "1",
            "--drain-s",
            "2",
        ])
        .env("RUST_LOG", "debug")
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the server binary starts");
    let collect = |mut pipe: Box<dyn Read + Send>, into: Arc<Mutex<Vec<u8>>>| {
        std::thread::spawn(move || {
            let mut buf = [0u8; 4096];
            while let Ok(n) = pipe.read(&mut buf) {
                if n == 0 {
                    break;
                }
                if let Ok(mut all) = into.lock() {
                    all.extend_from_slice(&buf[..n]);
                }
            }
        })
    };
    let (stdout, stderr) = (
        Arc::new(Mutex::new(Vec::new())),
        Arc::new(Mutex::new(Vec::new())),
    );
    let readers = [
        collect(
            Box::new(child.stdout.take().expect("stdout")),
            stdout.clone(),
        ),
        collect(
            Box::new(child.stderr.take().expect("stderr")),
            stderr.clone(),
        ),
    ];
    // The server logs `serving addr=...` once it listens.
    let deadline = Instant::now() + Duration::from_secs(60);
    let addr = loop {
        let text = strip_ansi(&String::from_utf8_lossy(
            &stderr.lock().expect("log").clone(),
        ));
        if let Some(line) = text
            .lines()
            .find(|l| l.contains("serving") && l.contains("addr="))
        {
            let at = line.find("addr=").expect("addr") + 5;
            break line[at..]
                .split_whitespace()
                .next()
                .expect("address")
                .to_string();
        }
        if Instant::now() > deadline || child.try_wait().ok().flatten().is_some() {
            let _ = child.kill();
            panic!("the server did not report its address:\n{text}");
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    let url = format!("http://{addr}");
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .expect("runtime");
    let frames: Vec<pb::SessionInput> = {
        let rgb: Vec<u8> = PATTERN.iter().copied().cycle().take(32 * 24 * 3).collect();
        let frame = |seq, format: pb::PixelFormat, width, height, data: Vec<u8>| pb::SessionInput {
            item: Some(pb::session_input::Item::Frame(pb::Frame {
                seq,
                format: format as i32,
                width,
                height,
                data: data.into(),
                ..Default::default()
            })),
        };
        vec![
            frame(1, pb::PixelFormat::Rgb8, 32, 24, rgb.clone()),
            frame(2, pb::PixelFormat::Gray8, 32, 24, rgb.clone()),
            frame(3, pb::PixelFormat::Png, 0, 0, rgb.clone()),
            frame(4, pb::PixelFormat::Jpeg, 0, 0, rgb),
        ]
    };
    runtime.block_on(async {
        let session = |token: Option<&'static str>, frames: Vec<pb::SessionInput>| {
            let url = url.clone();
            async move {
                let channel = tonic::transport::Channel::from_shared(url)
                    .expect("url")
                    .connect()
                    .await
                    .expect("connects");
                let mut client = pb::frame_analysis_client::FrameAnalysisClient::with_interceptor(
                    channel,
                    move |mut request: tonic::Request<()>| {
                        if let Some(token) = token {
                            let value = format!("Bearer {token}").parse().expect("header value");
                            request.metadata_mut().insert("authorization", value);
                        }
                        Ok(request)
                    },
                );
                let mut inputs = vec![pb::SessionInput {
                    item: Some(pb::session_input::Item::Opening(pb::SessionOpening {
                        source_label: "fuzz secrets check".into(),
                        ..Default::default()
                    })),
                }];
                inputs.extend(frames);
                let listed = client
                    .list_model_cards(pb::ModelCardsRequest {})
                    .await
                    .map(|_| ());
                let mut answers = match client.run_session(tokio_stream::iter(inputs)).await {
                    Ok(r) => r.into_inner(),
                    Err(status) => return (listed, Err(status.code()), 0),
                };
                let mut n = 0;
                loop {
                    match answers.message().await {
                        Ok(Some(_)) => n += 1,
                        Ok(None) => return (listed, Ok(()), n),
                        Err(status) => return (listed, Err(status.code()), n),
                    }
                }
            }
        };
        let (listed, opened, _) = session(Some(WRONG), frames.clone()).await;
        assert_eq!(
            listed.map_err(|s| s.code()),
            Err(tonic::Code::Unauthenticated)
        );
        assert_eq!(opened, Err(tonic::Code::Unauthenticated));
        let (_, opened, _) = session(None, frames.clone()).await;
        assert_eq!(opened, Err(tonic::Code::Unauthenticated));
        let (listed, opened, outputs) = session(Some(TOKEN), frames.clone()).await;
        assert!(listed.is_ok() && opened.is_ok(), "{listed:?} {opened:?}");
        assert_eq!(
            outputs,
            1 + frames.len() + 1,
            "accepted, one answer per frame, the summary"
        );
    });
    let pid = child.id().to_string();
    let status = Command::new("kill")
        .args(["-TERM", &pid])
        .status()
        .expect("kill runs");
    assert!(status.success(), "SIGTERM sent");
    let deadline = Instant::now() + Duration::from_secs(20);
    let exit = loop {
        if let Some(exit) = child.try_wait().expect("wait") {
            break exit;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            panic!("the server did not stop within 20 s of SIGTERM");
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    for r in readers {
        let _ = r.join();
    }
    let mut log = stdout.lock().expect("stdout").clone();
    log.extend_from_slice(&stderr.lock().expect("stderr"));
    let text = strip_ansi(&String::from_utf8_lossy(&log));
    assert!(
        exit.success(),
        "the server exits cleanly on SIGTERM: {exit:?}\n{text}"
    );
    assert!(
        text.contains("DEBUG") && text.contains("session opened") && text.contains("session ended"),
        "the log was captured at debug level:\n{text}"
    );
    let raw = String::from_utf8_lossy(&log).into_owned();
    for (what, secret) in [
        ("token", TOKEN.as_bytes()),
        ("wrong token", WRONG.as_bytes()),
        ("frame bytes", PATTERN),
    ] {
        for form in secret_forms(secret) {
            assert!(
                !text.contains(&form) && !raw.contains(&form),
                "the {what} appears in the server's log as `{form}`"
            );
        }
    }
    eprintln!(
        "secrets: {} bytes of debug log hold neither the tokens nor the frame bytes",
        log.len()
    );
}

// ---------------------------------------------------------------------------------------------------------
// The seed corpora, from synthetic content.
// ---------------------------------------------------------------------------------------------------------

/// ITU-R BT.601 8-bit limited range: Y, Cb, Cr of an RGB pixel.
fn bt601(p: &[u8]) -> [u8; 3] {
    let (r, g, b) = (f64::from(p[0]), f64::from(p[1]), f64::from(p[2]));
    [
        (16.0 + (65.481 * r + 128.553 * g + 24.966 * b) / 255.0).round() as u8,
        (128.0 + (-37.797 * r - 74.203 * g + 112.0 * b) / 255.0).round() as u8,
        (128.0 + (112.0 * r - 93.786 * g - 18.214 * b) / 255.0).round() as u8,
    ]
}

#[test]
#[ignore = "rewrites the seed corpora under tests/corpus/; run by hand when a seed format changes"]
fn write_seed_corpora() {
    use framewise_models_demo::phantom::{Drum, random_view};
    use image::ImageEncoder;
    let root = workspace_root().join("tests/corpus");
    let mut rng = Rng::new(0x5EED_C0DE);
    let drum = Drum::random(4, &mut rng);
    let mut picture = |w: u32, h: u32| drum.render(&random_view(&drum, &mut rng), w, h);
    let write = |target: &str, name: &str, bytes: &[u8]| {
        let dir = root.join(target);
        std::fs::create_dir_all(&dir).expect("corpus folder");
        std::fs::write(dir.join(name), bytes).expect("corpus file");
    };

    // Raw frames: every format at 16x12, packed, with padded rows, and with an odd region.
    let rgb = picture(16, 12);
    for format in RAW_FORMATS {
        let packed = frame::encode_from_rgb(&rgb, 16, 12, format).expect("encodes");
        let row = row_bytes(format, 16) as u32;
        for (stride, region) in [
            (0, None),
            (row + 6, None),
            (
                row + 6,
                Some(Region {
                    x: 3,
                    y: 1,
                    width: 9,
                    height: 7,
                }),
            ),
        ] {
            let f = RawFrame {
                format,
                width: 16,
                height: 12,
                stride,
                region,
                limits: SMALL_LIMITS,
                yuv: YuvSpec::default(),
                model: u8::from(region.is_some()),
                data: pad_to_stride(format, 16, 12, &packed, stride),
            };
            write("frames", &raw_frame_name(&f), &f.data);
        }
    }

    // PNG and JPEG: colour, grey, alpha, 16-bit, a single pixel.
    let encode_png = |buf: &[u8], w, h, kind| {
        let mut out = Vec::new();
        image::codecs::png::PngEncoder::new(&mut out)
            .write_image(buf, w, h, kind)
            .expect("png");
        out
    };
    let encode_jpeg = |buf: &[u8], w, h, kind| {
        let mut out = Vec::new();
        image::codecs::jpeg::JpegEncoder::new_with_quality(&mut out, 85)
            .write_image(buf, w, h, kind)
            .expect("jpeg");
        out
    };
    let colour = picture(64, 48);
    let grey_source = picture(32, 24);
    let grey: Vec<u8> = grey_source.chunks_exact(3).map(|p| bt601(p)[0]).collect();
    let small = picture(16, 12);
    let rgba: Vec<u8> = small
        .chunks_exact(3)
        .flat_map(|p| [p[0], p[1], p[2], 200])
        .collect();
    let rgb16: Vec<u8> = small
        .iter()
        .flat_map(|&v| (u16::from(v) * 257).to_ne_bytes())
        .collect();
    use image::ExtendedColorType as C;
    write(
        "encoded",
        "phantom-64x48.png",
        &encode_png(&colour, 64, 48, C::Rgb8),
    );
    write(
        "encoded",
        "phantom-64x48.jpg",
        &encode_jpeg(&colour, 64, 48, C::Rgb8),
    );
    write(
        "encoded",
        "gray-32x24.png",
        &encode_png(&grey, 32, 24, C::L8),
    );
    write(
        "encoded",
        "gray-32x24.jpg",
        &encode_jpeg(&grey, 32, 24, C::L8),
    );
    write(
        "encoded",
        "rgba-16x12.png",
        &encode_png(&rgba, 16, 12, C::Rgba8),
    );
    write(
        "encoded",
        "rgb16-16x12.png",
        &encode_png(&rgb16, 16, 12, C::Rgb16),
    );
    write(
        "encoded",
        "pixel-1x1.png",
        &encode_png(&[40, 90, 200], 1, 1, C::Rgb8),
    );
    // Regression: an ICC profile that inflates to 8 MiB, which the PNG decoder once inflated whole.
    let phantom_png = encode_png(&colour, 64, 48, C::Rgb8);
    write(
        "encoded",
        "regression-iccp-bomb-l64x48.png",
        &png_with_profile_bomb(&phantom_png, 8 << 20),
    );

    // Manifests: the demo's, and two invented ones using the other choices of every field.
    write("manifest", "demo.toml", DEMO_MANIFEST.as_bytes());
    let letterbox = DEMO_MANIFEST
        .replace("resize = \"centre_crop\"", "resize = \"letterbox\"")
        .replace(
            "interpolation = \"opencv-area\"",
            "interpolation = \"pillow-bilinear\"",
        )
        .replace("letterbox_fill = 0", "letterbox_fill = 114");
    write("manifest", "letterbox.toml", letterbox.as_bytes());
    let minimal = "name = \"tiny\"\nversion = \"0\"\nfile = \"tiny.onnx\"\nclasses = [\"a\", \"b\"]\n\
                   intended_use = \"fuzz corpus only\"\n\n[input]\ntensor = \"x\"\nlayout = \"nhwc\"\n\
                   width = 8\nheight = 8\ncolour_order = \"bgr\"\nscale = 1.0\nmean = [0.0, 0.0, 0.0]\n\
                   std = [255.0, 255.0, 255.0]\nresize = \"stretch\"\ninterpolation = \"opencv-linear\"\n\n\
                   [output]\nkind = \"probabilities\"\n";
    write("manifest", "minimal.toml", minimal.as_bytes());

    // Session inputs: openings with each filter, and frames.
    use pb::filter_settings::Kind;
    let opening = |o: pb::SessionOpening| pb::SessionInput {
        item: Some(pb::session_input::Item::Opening(o)),
    };
    let openings = [
        ("opening-default.pb", pb::SessionOpening::default()),
        (
            "opening-forward.pb",
            pb::SessionOpening {
                frame_file: String::new(),
                model: "phantom-zones".into(),
                default_format: pb::PixelFormat::Nv12 as i32,
                yuv_matrix: pb::YuvMatrix::Bt709 as i32,
                yuv_range: pb::YuvRange::Full as i32,
                region: Some(pb::Region {
                    x: 2,
                    y: 2,
                    width: 40,
                    height: 30,
                }),
                filter: Some(pb::FilterSettings {
                    kind: Some(Kind::Forward(pb::Forward {
                        stay: vec![0.95],
                        priors: vec![0.25; 4],
                        step_ms: 0.0,
                    })),
                }),
                decision: Some(pb::DecisionSettings {
                    enter: 0.7,
                    exit: 0.5,
                    dwell_ms: 200.0,
                }),
                quality: Some(pb::QualitySettings {
                    min_focus: 5.0,
                    max_clipped: 0.5,
                }),
                policy: pb::FramePolicy::LatestOnly as i32,
                deadline_ms: 50,
                source_label: "bench 2".into(),
            },
        ),
        (
            "opening-window.pb",
            pb::SessionOpening {
                filter: Some(pb::FilterSettings {
                    kind: Some(Kind::Window(pb::Window {
                        frames: 5,
                        span_ms: 250.0,
                    })),
                }),
                policy: pb::FramePolicy::EveryFrame as i32,
                ..Default::default()
            },
        ),
        (
            "opening-exponential.pb",
            pb::SessionOpening {
                default_format: pb::PixelFormat::Png as i32,
                filter: Some(pb::FilterSettings {
                    kind: Some(Kind::Exponential(pb::Exponential { tau_ms: 300.0 })),
                }),
                ..Default::default()
            },
        ),
        (
            "opening-pass-through.pb",
            pb::SessionOpening {
                filter: Some(pb::FilterSettings {
                    kind: Some(Kind::PassThrough(pb::PassThrough {})),
                }),
                decision: Some(pb::DecisionSettings {
                    enter: 1.0,
                    exit: 0.0,
                    dwell_ms: 0.0,
                }),
                ..Default::default()
            },
        ),
    ];
    for (name, o) in openings {
        write("opening", name, &opening(o).encode_to_vec());
    }
    let rgb86 = picture(8, 6);
    let wire_frame = |format: PixelFormat, width, height, stride, data| pb::SessionInput {
        item: Some(pb::session_input::Item::Frame(pb::Frame {
            file_slice: None,
            seq: 7,
            capture_time_us: 1_000_000,
            format: convert::wire_format(format) as i32,
            width,
            height,
            stride,
            data: prost::bytes::Bytes::from(data),
        })),
    };
    let nv12 = frame::encode_from_rgb(&rgb86, 8, 6, PixelFormat::Nv12).expect("nv12");
    let png = frame::encode_from_rgb(&rgb86, 8, 6, PixelFormat::Png).expect("png");
    write(
        "opening",
        "frame-rgb8.pb",
        &wire_frame(PixelFormat::Rgb8, 8, 6, 0, rgb86.clone()).encode_to_vec(),
    );
    write(
        "opening",
        "frame-nv12-stride.pb",
        &wire_frame(
            PixelFormat::Nv12,
            8,
            6,
            10,
            pad_to_stride(PixelFormat::Nv12, 8, 6, &nv12, 10),
        )
        .encode_to_vec(),
    );
    write(
        "opening",
        "frame-png.pb",
        &wire_frame(PixelFormat::Png, 0, 0, 0, png).encode_to_vec(),
    );

    // Y4M: 4:2:0 (with the usual optional tags), 4:2:2, 4:4:4, and an odd size with no colour tag.
    let y4m = |header: &str, frames: &[Vec<u8>]| {
        let mut out = format!("{header}\n").into_bytes();
        for f in frames {
            out.extend_from_slice(b"FRAME\n");
            out.extend_from_slice(f);
        }
        out
    };
    let planes_420 =
        |w, h, rgb: &[u8]| frame::encode_from_rgb(rgb, w, h, PixelFormat::I420).expect("i420");
    let planes_422 = |w: u32, h: u32, rgb: &[u8]| {
        let yuyv = frame::encode_from_rgb(rgb, w, h, PixelFormat::Yuyv).expect("yuyv");
        let y: Vec<u8> = yuyv.chunks_exact(2).map(|p| p[0]).collect();
        let u: Vec<u8> = yuyv.chunks_exact(4).map(|p| p[1]).collect();
        let v: Vec<u8> = yuyv.chunks_exact(4).map(|p| p[3]).collect();
        [y, u, v].concat()
    };
    let planes_444 = |rgb: &[u8]| {
        let yuv: Vec<[u8; 3]> = rgb.chunks_exact(3).map(bt601).collect();
        (0..3)
            .flat_map(|c| yuv.iter().map(move |p| p[c]))
            .collect::<Vec<u8>>()
    };
    let (a, b) = (picture(8, 6), picture(8, 6));
    write(
        "y4m",
        "c420.y4m",
        &y4m(
            "YUV4MPEG2 W8 H6 F30:1 Ip A1:1 C420jpeg XYSCSS=420JPEG",
            &[planes_420(8, 6, &a), planes_420(8, 6, &b)],
        ),
    );
    let (a, b) = (picture(8, 4), picture(8, 4));
    write(
        "y4m",
        "c422.y4m",
        &y4m(
            "YUV4MPEG2 W8 H4 F25:1 C422",
            &[planes_422(8, 4, &a), planes_422(8, 4, &b)],
        ),
    );
    let (a, b) = (picture(6, 4), picture(6, 4));
    write(
        "y4m",
        "c444.y4m",
        &y4m(
            "YUV4MPEG2 W6 H4 F30000:1001 C444",
            &[planes_444(&a), planes_444(&b)],
        ),
    );
    let odd: Vec<u8> = (0..7 * 5 + 2 * 4 * 3)
        .map(|i| (16 + i * 7 % 200) as u8)
        .collect();
    write("y4m", "odd-7x5.y4m", &y4m("YUV4MPEG2 W7 H5 F30:1", &[odd]));

    // Labels for a folder recording of three frames.
    write(
        "recording",
        "labels.csv",
        b"# synthetic labels for the fuzz corpus\nfile,timestamp_ms,label\nframe_000.png,0,plain\n\
          frame_001.png,33.3,dotted\nframe_002.jpg,66.7\n",
    );
    write(
        "recording",
        "labels-no-header.csv",
        b"frame_000.png,0,grid\nframe_002.jpg,100,striped\n",
    );
}
