//! `ohmline bench`: measurements of the running service (not tests). With no
//! subcommand (or `bench all`) it runs every measurement below with its
//! defaults and prints one table.
//!
//! - `bench ingest` starts the real HTTP service in this process on a loopback
//!   port over a fresh database of each engine and uploads 2,000-reading CSV
//!   epochs through the real API: first one at a time (throughput), then from
//!   several concurrent uploaders (acknowledgement latency, median and 99th
//!   percentile).
//! - `bench season` uploads a season of forward-modelled epochs for several
//!   lines into a scratch PostgreSQL database, then reprocesses the whole
//!   season of one line and of all lines with 1 and with 2 worker processes
//!   (`ohmline serve --role worker`, one job loop each, spawned from this
//!   binary): wall time, scaling ratio, each worker's peak memory (VmHWM),
//!   and the median inversion seconds per epoch the workers stored.
//! - `bench latency` runs the whole service in this process on SQLite and
//!   measures, for a 96-electrode epoch, the time from its upload to the alert
//!   email written to the outbox (three quiet epochs form the baseline; the
//!   epochs after them carry a conductive block until an alert is emailed).
//! - `bench load` registers many lines in a scratch database of each engine,
//!   starts `ohmline serve --role api` (no job workers: the processing the
//!   uploads queue would run in worker processes) in its own process and
//!   drives it with [`crate::loadgen`]: uploads from every line at a fixed
//!   offered rate plus page and API reads, for a fixed time; it prints the
//!   offered and achieved upload rates, acknowledgement and read latency
//!   (median, 99th percentile) and errors. Rate limits and the backlog bound
//!   are the defaults, raised where the run would reach them (printed).

use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use chrono::{TimeZone, Utc};
use clap::{Args, Subcommand};
use ohmline_core::forward::{Forward, ForwardParams, Resistivity};
use ohmline_core::geometry::{LineGeometry, Surface};
use ohmline_core::mesh::{Mesh, MeshParams};
use ohmline_core::model::{Body, ModelDescription};
use ohmline_core::noise::{NoiseParams, add_noise};
use ohmline_core::sequence::{Quadrupole, Sequence};
use tokio::net::TcpListener;

use crate::app::{AppState, serve};
use crate::config::Config;
use crate::db::lines::NewElectrode;
use crate::db::{self, Db};
use crate::loadgen::{add_line, epoch_csv, flat_line, percentile};

/// The default scratch PostgreSQL server.
const DEFAULT_POSTGRES: &str = "postgres://postgres@127.0.0.1:5432/postgres";

/// `ohmline bench [COMMAND]`.
#[derive(Debug, Args)]
pub struct BenchArgs {
    /// One measurement; none runs them all and prints one table.
    #[command(subcommand)]
    pub cmd: Option<BenchCmd>,
}

/// `ohmline bench …`
#[derive(Debug, Subcommand)]
pub enum BenchCmd {
    /// Readings per second and acknowledgement latency of epoch uploads.
    Ingest(IngestArgs),
    /// Whole-season reprocessing with 1 and 2 worker processes (scaling,
    /// peak memory per worker, inversion seconds per epoch).
    Season(SeasonArgs),
    /// Upload-to-alert-email latency of one 96-electrode epoch.
    Latency(LatencyArgs),
    /// Many lines uploading at a fixed rate while pages and the API are read:
    /// throughput, acknowledgement and read latency, errors.
    Load(LoadArgs),
    /// Every measurement with its defaults, one table.
    All(AllArgs),
}

/// Options of `ohmline bench all`.
#[derive(Debug, Args)]
pub struct AllArgs {
    /// PostgreSQL server to create scratch databases on.
    #[arg(long, default_value = DEFAULT_POSTGRES)]
    pub postgres: String,
}

/// Options of `ohmline bench ingest`.
#[derive(Debug, Clone, Args)]
pub struct IngestArgs {
    /// Engines to measure: sqlite, postgres or both (comma-separated).
    #[arg(long, default_value = "sqlite,postgres")]
    pub engines: String,
    /// PostgreSQL server to create a scratch database on.
    #[arg(long, default_value = DEFAULT_POSTGRES)]
    pub postgres: String,
    /// Epochs uploaded one at a time for the throughput figure.
    #[arg(long, default_value_t = 40)]
    pub epochs: usize,
    /// Readings per epoch.
    #[arg(long, default_value_t = 2000)]
    pub readings: usize,
    /// Concurrent uploaders for the latency figure.
    #[arg(long, default_value_t = 8)]
    pub concurrency: usize,
    /// Epochs per uploader in the latency phase.
    #[arg(long, default_value_t = 10)]
    pub per_uploader: usize,
}

impl IngestArgs {
    fn defaults(postgres: &str) -> Self {
        Self {
            engines: "sqlite,postgres".into(),
            postgres: postgres.into(),
            epochs: 40,
            readings: 2000,
            concurrency: 8,
            per_uploader: 10,
        }
    }
}

/// Options of `ohmline bench season`.
#[derive(Debug, Clone, Args)]
pub struct SeasonArgs {
    /// PostgreSQL server to create a scratch database on.
    #[arg(long, default_value = DEFAULT_POSTGRES)]
    pub postgres: String,
    /// Electrodes of each line (flat, 1 m apart; Wenner and dipole–dipole).
    #[arg(long, default_value_t = 48)]
    pub electrodes: usize,
    /// Epochs of each line's season (the baseline is inverted once per worker
    /// process, so short seasons understate what a second worker adds).
    #[arg(long, default_value_t = 24)]
    pub epochs: usize,
    /// Lines of the several-line figure.
    #[arg(long, default_value_t = 2)]
    pub lines: usize,
}

impl SeasonArgs {
    fn defaults(postgres: &str) -> Self {
        Self { postgres: postgres.into(), electrodes: 48, epochs: 24, lines: 2 }
    }
}

/// Options of `ohmline bench latency`.
#[derive(Debug, Clone, Args)]
pub struct LatencyArgs {
    /// Electrodes of the line (flat, 1 m apart).
    #[arg(long, default_value_t = 96)]
    pub electrodes: usize,
    /// Most epochs with the block uploaded while waiting for the alert.
    #[arg(long, default_value_t = 6)]
    pub max_block_epochs: usize,
}

impl LatencyArgs {
    fn defaults() -> Self {
        Self { electrodes: 96, max_block_epochs: 6 }
    }
}

/// Options of `ohmline bench load`.
#[derive(Debug, Clone, Args)]
pub struct LoadArgs {
    /// Engines to measure: sqlite, postgres or both (comma-separated).
    #[arg(long, default_value = "sqlite,postgres")]
    pub engines: String,
    /// PostgreSQL server to create a scratch database on.
    #[arg(long, default_value = DEFAULT_POSTGRES)]
    pub postgres: String,
    /// Simulated lines, each with its own meter token.
    #[arg(long, default_value_t = 50)]
    pub lines: usize,
    /// Uploads offered per second, all lines together.
    #[arg(long, default_value_t = 50.0)]
    pub rate: f64,
    /// Length of the run, s (uploads = rate × duration).
    #[arg(long, default_value_t = 20.0)]
    pub duration: f64,
    /// Page and API reads offered per second over the same time.
    #[arg(long, default_value_t = 10.0)]
    pub reads: f64,
    /// Electrodes of each line (flat, 1 m apart; every Wenner and
    /// dipole–dipole quadrupole that fits: 837 readings per epoch at 48).
    #[arg(long, default_value_t = 48)]
    pub electrodes: usize,
}

impl LoadArgs {
    fn defaults(postgres: &str) -> Self {
        Self {
            engines: "sqlite,postgres".into(),
            postgres: postgres.into(),
            lines: 50,
            rate: 50.0,
            duration: 20.0,
            reads: 10.0,
            electrodes: 48,
        }
    }
}

/// Runs a benchmark.
pub async fn run(args: BenchArgs) -> anyhow::Result<()> {
    match args.cmd {
        Some(BenchCmd::Ingest(a)) => {
            let rows = ingest_rows(&a).await?;
            print_ingest(&a, &rows);
            Ok(())
        }
        Some(BenchCmd::Season(a)) => {
            let r = season(&a).await?;
            print_season(&a, &r);
            Ok(())
        }
        Some(BenchCmd::Latency(a)) => {
            let r = latency(&a).await?;
            print_latency(&a, &r);
            Ok(())
        }
        Some(BenchCmd::Load(a)) => {
            let rows = load_rows(&a).await?;
            print_load(&a, &rows);
            Ok(())
        }
        Some(BenchCmd::All(a)) => all(&a.postgres).await,
        None => all(DEFAULT_POSTGRES).await,
    }
}

/// Every measurement with its defaults, then one table.
async fn all(postgres: &str) -> anyhow::Result<()> {
    let ia = IngestArgs::defaults(postgres);
    let sa = SeasonArgs::defaults(postgres);
    let la = LatencyArgs::defaults();
    let lo = LoadArgs::defaults(postgres);
    let ingest = ingest_rows(&ia).await?;
    let season = season(&sa).await?;
    let lat = latency(&la).await?;
    let load = load_rows(&lo).await?;
    println!();
    println!("{:<58} figure", "what");
    for r in &ingest {
        println!(
            "{:<58} {:.0} readings/s sequential; {:.0}/s with {} uploaders, p50 {:.0} ms, p99 {:.0} ms",
            format!("ingest, {}, {}-reading CSV epochs", r.engine, ia.readings),
            r.readings_per_s,
            r.concurrent_readings_per_s,
            ia.concurrency,
            r.p50_ms,
            r.p99_ms
        );
    }
    println!(
        "{:<58} single {:.2} s, time-lapse {:.2} s (median per epoch, as stored)",
        format!("inversion per epoch, {} electrodes, in the workers", sa.electrodes),
        season.single_s,
        season.change_s
    );
    for r in &season.rows {
        println!("{:<58} {}", season_label(&sa, r), season_figure(r));
    }
    for lines in [1, sa.lines] {
        if let Some(ratio) = season.ratio(lines) {
            println!(
                "{:<58} {ratio:.2} × (2 workers against 1)",
                format!("reprocess scaling, {lines} line(s)")
            );
        }
    }
    println!(
        "{:<58} {}",
        format!("upload → alert email, one {}-electrode epoch", la.electrodes),
        latency_figure(&lat)
    );
    for r in &load {
        println!("{:<58} {}", format!("load, {}, {} lines", r.engine, lo.lines), load_figure(r));
    }
    println!(
        "forward and inversion kernels of the two reference lines: cargo bench -p ohmline-core --bench forward|inversion"
    );
    Ok(())
}

struct Row {
    engine: &'static str,
    readings_per_s: f64,
    epoch_ms_median: f64,
    concurrent_readings_per_s: f64,
    p50_ms: f64,
    p99_ms: f64,
}

/// A scratch PostgreSQL database on the server of `admin_url`, dropped by
/// [`Scratch::drop_now`].
struct Scratch {
    admin: Db,
    name: String,
    url: String,
}

impl Scratch {
    async fn create(admin_url: &str, tag: &str) -> anyhow::Result<Scratch> {
        let name = format!("ohmline_bench_{tag}_{}", std::process::id());
        let admin = Db::connect(admin_url).await.context("connecting to PostgreSQL")?;
        let Db::Postgres(pool) = &admin else { bail!("--postgres must be a postgres:// URL") };
        sqlx::query(&format!("DROP DATABASE IF EXISTS {name}")).execute(pool).await?;
        sqlx::query(&format!("CREATE DATABASE {name}")).execute(pool).await?;
        let base = admin_url.rsplit_once('/').map(|(b, _)| b).unwrap_or(admin_url);
        let url = format!("{base}/{name}");
        Ok(Scratch { admin, name, url })
    }

    async fn drop_now(self) -> anyhow::Result<()> {
        if let Db::Postgres(pool) = &self.admin {
            sqlx::query(&format!("DROP DATABASE IF EXISTS {} WITH (FORCE)", self.name))
                .execute(pool)
                .await?;
        }
        self.admin.close().await;
        Ok(())
    }
}

async fn ingest_rows(args: &IngestArgs) -> anyhow::Result<Vec<Row>> {
    let mut rows = Vec::new();
    for engine in args.engines.split(',').map(str::trim) {
        let row = match engine {
            "sqlite" => {
                let dir = tempfile::tempdir()?;
                let url = format!("sqlite://{}", dir.path().join("bench.sqlite").display());
                bench_engine("SQLite", &url, args).await?
            }
            "postgres" => {
                let scratch = Scratch::create(&args.postgres, "ingest").await?;
                let result = bench_engine("PostgreSQL", &scratch.url, args).await;
                scratch.drop_now().await?;
                result?
            }
            other => bail!("unknown engine {other:?}: use sqlite or postgres"),
        };
        rows.push(row);
    }
    Ok(rows)
}

fn print_ingest(args: &IngestArgs, rows: &[Row]) {
    println!();
    println!(
        "ingest of {}-reading CSV epochs over HTTP on loopback ({} sequential epochs; {} uploaders × {} epochs)",
        args.readings, args.epochs, args.concurrency, args.per_uploader
    );
    println!(
        "{:<11} {:>18} {:>16} {:>22} {:>10} {:>10}",
        "engine",
        "readings/s (1 up)",
        "epoch ms (med)",
        "readings/s (concurrent)",
        "p50 ms",
        "p99 ms"
    );
    for r in rows {
        println!(
            "{:<11} {:>18.0} {:>16.1} {:>22.0} {:>10.1} {:>10.1}",
            r.engine,
            r.readings_per_s,
            r.epoch_ms_median,
            r.concurrent_readings_per_s,
            r.p50_ms,
            r.p99_ms
        );
    }
}

/// A flat 96-electrode line at 1 m with Wenner (a = 1…15) and dipole–dipole
/// (a = 1…2, n = 1…6) quadrupoles, cut to `n` quadrupoles.
fn bench_line(n: usize) -> anyhow::Result<(Vec<NewElectrode>, LineGeometry, Sequence)> {
    let (electrodes, geometry, seq) = flat_line(96)?;
    if seq.len() < n {
        bail!(
            "the bench line has only {} quadrupoles; ask for at most that many readings",
            seq.len()
        );
    }
    let q: Vec<Quadrupole> = seq.quadrupoles()[..n].to_vec();
    Ok((electrodes, geometry, Sequence::new(q, 96)?))
}

async fn bench_engine(label: &'static str, url: &str, args: &IngestArgs) -> anyhow::Result<Row> {
    eprintln!("{label}: preparing");
    let db = Db::connect(url).await?;
    db.migrate().await?;
    let site = db::sites::create(&db, "Bench reach", "benchmark data").await?;
    let (electrodes, geometry, seq) = bench_line(args.readings)?;
    let (_, token) = add_line(&db, site.id, "bench", 3600, &electrodes, &seq, "bench").await?;

    let mut config = Config {
        database: Some(url.to_string()),
        data_dir: PathBuf::from("."),
        ..Config::default()
    };
    // Throughput is measured, not limited (no workers run here either).
    config.limits = config.limits.without_rate_limits();
    let state = AppState::new(db.clone(), config);
    let listener = TcpListener::bind("127.0.0.1:0").await?;
    let base = format!("http://{}", listener.local_addr()?);
    let (stop_tx, mut stop_rx) = tokio::sync::watch::channel(false);
    let server = tokio::spawn(serve(listener, state, async move {
        let _ = stop_rx.changed().await;
    }));

    let total = args.epochs + args.concurrency * args.per_uploader + 1;
    let bodies: Arc<Vec<String>> =
        Arc::new((0..total).map(|k| epoch_csv(&geometry, &seq, k, 0)).collect());
    let client = reqwest::Client::new();
    let url = format!("{base}/api/v1/lines/bench/epochs");
    let post = move |k: usize| {
        let (client, url, token, bodies) =
            (client.clone(), url.clone(), token.clone(), bodies.clone());
        async move {
            let t0 = Instant::now();
            let r = client
                .post(&url)
                .bearer_auth(&token)
                .header("content-type", "text/csv")
                .body(bodies[k].clone())
                .send()
                .await?;
            let status = r.status();
            if status != 201 {
                bail!("upload {k} answered {status}: {}", r.text().await.unwrap_or_default());
            }
            anyhow::Ok(t0.elapsed())
        }
    };
    // Warm-up (connection, statement caches).
    post(total - 1).await?;

    eprintln!("{label}: {} sequential uploads", args.epochs);
    let mut seq_times = Vec::with_capacity(args.epochs);
    let t0 = Instant::now();
    for k in 0..args.epochs {
        seq_times.push(post(k).await?.as_secs_f64() * 1e3);
    }
    let seq_elapsed = t0.elapsed();
    seq_times.sort_by(f64::total_cmp);

    eprintln!("{label}: {} uploaders × {}", args.concurrency, args.per_uploader);
    let t0 = Instant::now();
    let mut tasks = Vec::new();
    for u in 0..args.concurrency {
        let post = post.clone();
        let start = args.epochs + u * args.per_uploader;
        let n = args.per_uploader;
        tasks.push(tokio::spawn(async move {
            let mut v: Vec<Duration> = Vec::with_capacity(n);
            for k in start..start + n {
                v.push(post(k).await?);
            }
            anyhow::Ok(v)
        }));
    }
    let mut lat = Vec::new();
    for t in tasks {
        lat.extend(t.await??.into_iter().map(|d| d.as_secs_f64() * 1e3));
    }
    let conc_elapsed = t0.elapsed();
    lat.sort_by(f64::total_cmp);

    let _ = stop_tx.send(true);
    server.await??;
    db.close().await;
    let n_conc = (args.concurrency * args.per_uploader) as f64;
    Ok(Row {
        engine: label,
        readings_per_s: (args.epochs * args.readings) as f64 / seq_elapsed.as_secs_f64(),
        epoch_ms_median: percentile(&seq_times, 0.5),
        concurrent_readings_per_s: n_conc * args.readings as f64 / conc_elapsed.as_secs_f64(),
        p50_ms: percentile(&lat, 0.5),
        p99_ms: percentile(&lat, 0.99),
    })
}

// ---------------------------------------------------------------------------
// Season reprocessing with worker processes.

/// The ground of the benchmark seasons (invented): 60 Ω·m, and from the middle
/// of the season a conductive block (−40 %) 1–3 m deep around the line's centre.
fn season_ground(length_m: f64, block: bool) -> anyhow::Result<ModelDescription> {
    let bodies = if block {
        let c = length_m / 2.0;
        vec![Body {
            polygon: vec![[c - 2.5, -3.0], [c + 2.5, -3.0], [c + 2.5, -1.0], [c - 2.5, -1.0]],
            rho: 36.0,
        }]
    } else {
        Vec::new()
    };
    Ok(ModelDescription::new(60.0, vec![], bodies)?)
}

/// Resistances of a line over the quiet ground and over the ground with the
/// block (forward model, no noise).
fn season_resistances(
    geometry: &LineGeometry,
    seq: &Sequence,
) -> anyhow::Result<(Vec<f64>, Vec<f64>)> {
    let surface = Surface::through_line(geometry, &[])?;
    let mesh = Mesh::new(geometry, &surface, &MeshParams::default())?;
    let fwd = Forward::new(mesh, &ForwardParams::default())?;
    let length = geometry.electrodes().last().map(|e| e.x()).unwrap_or(0.0);
    let mut out = Vec::new();
    for block in [false, true] {
        let rho = season_ground(length, block)?.on_triangles(fwd.mesh());
        out.push(fwd.simulate(Resistivity::Triangles(&rho), seq)?.resistances().to_vec());
    }
    let block = out.pop().expect("two");
    Ok((out.pop().expect("two"), block))
}

/// An epoch upload (CSV with resistances) with 1 % noise of seed `seed`.
fn resistance_csv(
    geometry: &LineGeometry,
    seq: &Sequence,
    r: &[f64],
    started_at: chrono::DateTime<Utc>,
    seed: u64,
) -> anyhow::Result<String> {
    let noisy = add_noise(r, &NoiseParams { relative: 0.01, absolute: 0.0, seed })?;
    let label = |i: Option<usize>| {
        i.map(|i| geometry.electrodes()[i].label().to_string()).unwrap_or_default()
    };
    let mut s = format!("# started_at: {}\na,b,m,n,resistance_ohm\n", started_at.to_rfc3339());
    for (q, v) in seq.quadrupoles().iter().zip(noisy) {
        s.push_str(&format!(
            "{},{},{},{},{v:.9}\n",
            label(Some(q.a)),
            label(q.b),
            label(Some(q.m)),
            label(q.n)
        ));
    }
    Ok(s)
}

/// One `ohmline serve` process spawned from this binary.
struct ServeProcess {
    child: std::process::Child,
    /// Where it listens (`http://127.0.0.1:port`).
    base: String,
}

impl ServeProcess {
    /// Starts a worker with one job loop and waits until it listens.
    async fn worker(url: &str, data_dir: &Path) -> anyhow::Result<ServeProcess> {
        let env = [("OHMLINE_WORKERS__CONCURRENCY".to_string(), "1".to_string())];
        Self::start(url, data_dir, "worker", &env).await
    }

    /// Starts `ohmline serve --role <role>` on a loopback port over the
    /// database at `url`, with more environment (settings as
    /// `OHMLINE_<TABLE>__<KEY>`), and waits until it listens.
    async fn start(
        url: &str,
        data_dir: &Path,
        role: &str,
        env: &[(String, String)],
    ) -> anyhow::Result<ServeProcess> {
        let exe = std::env::current_exe().context("finding this program")?;
        let mut child = std::process::Command::new(exe)
            .args(["serve", "--role", role, "--listen", "127.0.0.1:0"])
            .env_remove("OHMLINE_CONFIG")
            .env("OHMLINE_DATABASE", url)
            .env("OHMLINE_DATA_DIR", data_dir)
            .env("RUST_LOG", "warn")
            .envs(env.iter().cloned())
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::inherit())
            .spawn()
            .with_context(|| format!("starting a {role} process"))?;
        let stdout = child.stdout.take().expect("piped");
        let first = tokio::task::spawn_blocking(move || {
            use std::io::BufRead;
            let mut lines = std::io::BufReader::new(stdout).lines();
            let first = lines.next();
            std::thread::spawn(move || for _ in lines {});
            first
        })
        .await?;
        match first {
            Some(Ok(l)) if l.contains("listening on http://") => {
                let base = l.rsplit(' ').next().unwrap_or_default().to_string();
                Ok(ServeProcess { child, base })
            }
            _ => {
                let _ = child.kill();
                bail!("a {role} process did not start")
            }
        }
    }

    /// Peak resident memory so far (VmHWM), MiB.
    fn peak_mib(&self) -> f64 {
        peak_mib_of(&format!("/proc/{}/status", self.child.id()))
    }

    /// SIGTERM, then waits for the exit.
    async fn stop(mut self) -> anyhow::Result<()> {
        let pid = self.child.id().to_string();
        std::process::Command::new("kill").args(["-TERM", &pid]).status()?;
        tokio::task::spawn_blocking(move || self.child.wait()).await??;
        Ok(())
    }
}

fn peak_mib_of(status_file: &str) -> f64 {
    std::fs::read_to_string(status_file)
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("VmHWM:"))
                .and_then(|l| l.split_whitespace().nth(1).and_then(|v| v.parse::<f64>().ok()))
        })
        .map_or(f64::NAN, |kib| kib / 1024.0)
}

/// One reprocessing run.
struct SeasonRow {
    lines: usize,
    workers: usize,
    epochs: usize,
    seconds: f64,
    peak_mib: Vec<f64>,
}

/// What `bench season` measured.
struct SeasonResult {
    rows: Vec<SeasonRow>,
    quadrupoles: usize,
    /// Median seconds of a single-epoch inversion, as the workers stored them.
    single_s: f64,
    /// Median seconds of a time-lapse inversion.
    change_s: f64,
}

impl SeasonResult {
    /// Throughput of 2 workers over 1 for `lines` lines.
    fn ratio(&self, lines: usize) -> Option<f64> {
        let t = |w| self.rows.iter().find(|r| r.lines == lines && r.workers == w);
        Some(t(1)?.seconds / t(2)?.seconds)
    }
}

fn season_label(a: &SeasonArgs, r: &SeasonRow) -> String {
    format!(
        "reprocess {} line(s) × {} epochs ({} el.), {} worker(s)",
        r.lines, a.epochs, a.electrodes, r.workers
    )
}

fn season_figure(r: &SeasonRow) -> String {
    let mem: Vec<String> = r.peak_mib.iter().map(|m| format!("{m:.0}")).collect();
    format!(
        "{:.1} s ({:.2} s per epoch); peak memory per worker {} MiB",
        r.seconds,
        r.seconds / r.epochs as f64,
        mem.join(" / ")
    )
}

fn print_season(a: &SeasonArgs, r: &SeasonResult) {
    println!();
    println!(
        "season reprocessing on PostgreSQL: {} electrodes, {} quadrupoles, {} epochs per line",
        a.electrodes, r.quadrupoles, a.epochs
    );
    println!(
        "inversion per epoch in the workers (median): single {:.2} s, time-lapse {:.2} s",
        r.single_s, r.change_s
    );
    for row in &r.rows {
        println!("{:<58} {}", season_label(a, row), season_figure(row));
    }
    for lines in [1, a.lines] {
        if let Some(ratio) = r.ratio(lines) {
            println!("scaling with {lines} line(s): 2 workers = {ratio:.2} × 1 worker");
        }
    }
}

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f64::total_cmp);
    percentile(&v, 0.5)
}

/// Waits until no epoch of `lines` waits for processing.
async fn wait_lines_done(db: &Db, lines: &[i64], timeout: Duration) -> anyhow::Result<()> {
    let deadline = Instant::now() + timeout;
    loop {
        let mut pending = 0;
        for &l in lines {
            pending +=
                db::models::pending_since(db, l, chrono::DateTime::<Utc>::UNIX_EPOCH).await?;
        }
        if pending == 0 {
            return Ok(());
        }
        if Instant::now() > deadline {
            bail!("{pending} epochs still unprocessed after {} s", timeout.as_secs());
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

async fn season(a: &SeasonArgs) -> anyhow::Result<SeasonResult> {
    let scratch = Scratch::create(&a.postgres, "season").await?;
    let result = season_on(a, &scratch.url).await;
    scratch.drop_now().await?;
    result
}

async fn season_on(a: &SeasonArgs, url: &str) -> anyhow::Result<SeasonResult> {
    if a.lines == 0 || a.epochs < 4 {
        bail!("a season needs at least one line and four epochs");
    }
    let dir = tempfile::tempdir()?;
    let db = Db::connect(url).await?;
    db.migrate().await?;
    let (electrodes, geometry, seq) = flat_line(a.electrodes)?;
    eprintln!("season: forward-modelling {} quadrupoles", seq.len());
    let (g, q) = (geometry.clone(), seq.clone());
    let (quiet, block) = tokio::task::spawn_blocking(move || season_resistances(&g, &q)).await??;

    // Lines, tokens, and an API in this process (no workers) to upload through.
    let site = db::sites::create(&db, "Bench reach", "benchmark data").await?;
    let mut line_ids = Vec::new();
    let mut tokens = Vec::new();
    for i in 0..a.lines {
        let name = format!("season-{i}");
        let (line_id, token) =
            add_line(&db, site.id, &name, 6 * 3600, &electrodes, &seq, "bench").await?;
        line_ids.push(line_id);
        tokens.push((name, token));
    }
    let config = Config {
        database: Some(url.to_string()),
        data_dir: dir.path().to_path_buf(),
        ..Config::default()
    };
    let listener = TcpListener::bind("127.0.0.1:0").await?;
    let base = format!("http://{}", listener.local_addr()?);
    let (stop_tx, mut stop_rx) = tokio::sync::watch::channel(false);
    let server = tokio::spawn(serve(listener, AppState::new(db.clone(), config), async move {
        let _ = stop_rx.changed().await;
    }));
    let client = reqwest::Client::new();
    let t0 = Utc.with_ymd_and_hms(2026, 3, 1, 0, 0, 0).unwrap();
    eprintln!("season: uploading {} × {} epochs", a.lines, a.epochs);
    for (i, (name, token)) in tokens.iter().enumerate() {
        for k in 0..a.epochs {
            let r = if k < a.epochs / 2 { &quiet } else { &block };
            let at = t0 + chrono::Duration::hours(6 * k as i64);
            let body = resistance_csv(&geometry, &seq, r, at, (i * 1000 + k) as u64)?;
            let resp = client
                .post(format!("{base}/api/v1/lines/{name}/epochs"))
                .bearer_auth(token)
                .header("content-type", "text/csv")
                .body(body)
                .send()
                .await?;
            if resp.status() != 201 {
                bail!("upload answered {}: {}", resp.status(), resp.text().await?);
            }
        }
    }
    let _ = stop_tx.send(true);
    server.await??;

    // First pass: QC, baseline and processing with two workers (not timed).
    eprintln!("season: first processing pass");
    let mut workers = Vec::new();
    for _ in 0..2 {
        workers.push(ServeProcess::worker(url, dir.path()).await?);
    }
    wait_lines_done(&db, &line_ids, Duration::from_secs(7200)).await?;
    for w in workers {
        w.stop().await?;
    }

    let mut rows = Vec::new();
    let mut runs = vec![(1, 1), (1, 2)];
    if a.lines > 1 {
        runs.extend([(a.lines, 1), (a.lines, 2)]);
    }
    for (n_lines, n_workers) in runs {
        eprintln!("season: reprocessing {n_lines} line(s) with {n_workers} worker(s)");
        let mut workers = Vec::new();
        for _ in 0..n_workers {
            workers.push(ServeProcess::worker(url, dir.path()).await?);
        }
        let lines = &line_ids[..n_lines];
        let started = Instant::now();
        let mut epochs = 0;
        for &l in lines {
            db::alerts::supersede(&db, l, chrono::DateTime::<Utc>::UNIX_EPOCH).await?;
            epochs += db::models::reset_from(&db, l, None).await? as usize;
            crate::pipeline::process::queue_line(&db, l).await?;
        }
        wait_lines_done(&db, lines, Duration::from_secs(7200)).await?;
        let seconds = started.elapsed().as_secs_f64();
        let peak_mib = workers.iter().map(ServeProcess::peak_mib).collect();
        for w in workers {
            w.stop().await?;
        }
        rows.push(SeasonRow { lines: n_lines, workers: n_workers, epochs, seconds, peak_mib });
    }

    let mut single = Vec::new();
    let mut change = Vec::new();
    for &l in &line_ids {
        single.extend(db::models::line_models(&db, l).await?.into_iter().map(|(_, m)| m.seconds));
        change.extend(db::models::line_changes(&db, l).await?.into_iter().map(|(_, c)| c.seconds));
    }
    db.close().await;
    Ok(SeasonResult {
        rows,
        quadrupoles: seq.len(),
        single_s: median(single),
        change_s: median(change),
    })
}

// ---------------------------------------------------------------------------
// Upload → alert email.

/// What `bench latency` measured.
struct LatencyResult {
    /// Seconds from the upload to the email file, and which block epoch (1-based).
    email: Option<(f64, usize)>,
    /// Seconds from upload to `processed` of that epoch.
    processed_s: f64,
    quadrupoles: usize,
}

fn latency_figure(r: &LatencyResult) -> String {
    match r.email {
        Some((s, k)) => format!(
            "{s:.1} s ({:.1} s to processed; block epoch {k} raised the alert; {} quadrupoles)",
            r.processed_s, r.quadrupoles
        ),
        None => "no alert email within the block epochs uploaded".into(),
    }
}

fn print_latency(a: &LatencyArgs, r: &LatencyResult) {
    println!();
    println!(
        "upload → alert email, one {}-electrode epoch (SQLite, all roles in one process, default settings): {}",
        a.electrodes,
        latency_figure(r)
    );
}

/// `.eml` files in `dir`.
fn emails_in(dir: &Path) -> usize {
    std::fs::read_dir(dir)
        .map(|d| {
            d.filter_map(Result::ok)
                .filter(|e| e.path().extension().is_some_and(|x| x == "eml"))
                .count()
        })
        .unwrap_or(0)
}

async fn wait_status(db: &Db, epoch_id: i64, timeout: Duration) -> anyhow::Result<()> {
    let deadline = Instant::now() + timeout;
    loop {
        let e = db::epochs::get(db, epoch_id).await?.context("the epoch vanished")?;
        match e.status.as_str() {
            "processed" => return Ok(()),
            "failed" => bail!("epoch {epoch_id} failed to process"),
            _ => {}
        }
        if Instant::now() > deadline {
            bail!("epoch {epoch_id} not processed after {} s", timeout.as_secs());
        }
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

async fn latency(a: &LatencyArgs) -> anyhow::Result<LatencyResult> {
    let dir = tempfile::tempdir()?;
    let url = format!("sqlite://{}", dir.path().join("bench.sqlite").display());
    let db = Db::connect(&url).await?;
    db.migrate().await?;
    let (electrodes, geometry, seq) = flat_line(a.electrodes)?;
    eprintln!("latency: forward-modelling {} quadrupoles", seq.len());
    let (g, q) = (geometry.clone(), seq.clone());
    let (quiet, block) = tokio::task::spawn_blocking(move || season_resistances(&g, &q)).await??;
    let site = db::sites::create(&db, "Bench reach", "benchmark data").await?;
    let (_, token) =
        add_line(&db, site.id, "latency", 6 * 3600, &electrodes, &seq, "bench").await?;
    let address: lettre::Address = "duty@levees.example.org".parse()?;
    db::recipients::add(
        &db,
        &db::recipients::NewRecipient {
            email: &address,
            name: "Duty engineer",
            site_id: None,
            min_level: 1,
            delivery: db::recipients::Delivery::PerEvent,
        },
    )
    .await?;

    let config = Config {
        database: Some(url.clone()),
        data_dir: dir.path().to_path_buf(),
        ..Config::default()
    };
    let outbox = config.outbox_dir();
    let listener = TcpListener::bind("127.0.0.1:0").await?;
    let base = format!("http://{}", listener.local_addr()?);
    let (stop_tx, mut stop_rx) = tokio::sync::watch::channel(false);
    let service =
        super::serve::start(config, db.clone(), listener, super::serve::Role::All, async move {
            let _ = stop_rx.changed().await;
        })?;
    let client = reqwest::Client::new();
    let t0 = Utc.with_ymd_and_hms(2026, 3, 1, 0, 0, 0).unwrap();
    let upload = async |k: usize, r: &[f64]| -> anyhow::Result<i64> {
        let at = t0 + chrono::Duration::hours(6 * k as i64);
        let body = resistance_csv(&geometry, &seq, r, at, 500 + k as u64)?;
        let resp = client
            .post(format!("{base}/api/v1/lines/latency/epochs"))
            .bearer_auth(&token)
            .header("content-type", "text/csv")
            .body(body)
            .send()
            .await?;
        if resp.status() != 201 {
            bail!("upload answered {}: {}", resp.status(), resp.text().await?);
        }
        let v: serde_json::Value = resp.json().await?;
        v["epoch_id"].as_i64().context("no epoch id in the answer")
    };

    eprintln!("latency: three quiet epochs (the baseline)");
    for k in 0..3 {
        let id = upload(k, &quiet).await?;
        wait_status(&db, id, Duration::from_secs(600)).await?;
    }
    let mut result = None;
    let mut processed_s = f64::NAN;
    for k in 1..=a.max_block_epochs {
        let before = emails_in(&outbox);
        let started = Instant::now();
        let id = upload(2 + k, &block).await?;
        wait_status(&db, id, Duration::from_secs(600)).await?;
        let processed = started.elapsed().as_secs_f64();
        // The email worker polls every notify.poll_interval_s (2 s by default).
        let deadline = Instant::now() + Duration::from_secs(10);
        while Instant::now() < deadline && emails_in(&outbox) == before {
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        eprintln!("latency: block epoch {k} processed in {processed:.1} s");
        if emails_in(&outbox) > before {
            result = Some((started.elapsed().as_secs_f64(), k));
            processed_s = processed;
            break;
        }
    }
    let _ = stop_tx.send(true);
    service.wait().await?;
    Ok(LatencyResult { email: result, processed_s, quadrupoles: seq.len() })
}

// ---------------------------------------------------------------------------
// Load: many lines uploading while people read.

/// What `bench load` measured on one engine.
struct LoadRow {
    engine: &'static str,
    report: crate::loadgen::Report,
    /// Epochs in the database afterwards.
    stored: i64,
}

/// The rate limits and backlog bound of the measured server: the defaults,
/// raised where the run would reach them, so that the run measures the
/// service rather than its refusals. Each line uploads `rate / lines` per
/// second; every simulated meter shares the loopback address; the backlog
/// only grows, because the measured server runs no workers.
fn load_limits(a: &LoadArgs, uploads: usize) -> [(&'static str, u64); 3] {
    let d = crate::config::LimitsConfig::default();
    let per_line_per_min = a.rate / a.lines as f64 * 60.0;
    [
        (
            "uploads_per_minute_per_token",
            u64::from(d.uploads_per_minute_per_token).max((2.0 * per_line_per_min).ceil() as u64),
        ),
        (
            "uploads_per_minute_per_ip",
            u64::from(d.uploads_per_minute_per_ip).max((2.0 * a.rate * 60.0).ceil() as u64),
        ),
        ("max_backlog_epochs", d.max_backlog_epochs.max(2 * uploads as u64)),
    ]
}

fn load_plan(a: &LoadArgs) -> anyhow::Result<crate::loadgen::Plan> {
    if !(a.rate > 0.0 && a.rate.is_finite() && a.duration > 0.0 && a.duration.is_finite()) {
        bail!("--rate and --duration must be positive");
    }
    if a.lines == 0 {
        bail!("--lines must be at least 1");
    }
    Ok(crate::loadgen::Plan {
        uploads: (a.rate * a.duration).round().max(1.0) as usize,
        uploads_per_s: a.rate,
        reads_per_s: a.reads,
        timeout: Duration::from_secs(30),
    })
}

async fn load_rows(a: &LoadArgs) -> anyhow::Result<Vec<LoadRow>> {
    let plan = load_plan(a)?;
    let mut rows = Vec::new();
    for engine in a.engines.split(',').map(str::trim) {
        let row = match engine {
            "sqlite" => {
                let dir = tempfile::tempdir()?;
                let url = format!("sqlite://{}", dir.path().join("bench.sqlite").display());
                load_engine("SQLite", &url, dir.path(), a, &plan).await?
            }
            "postgres" => {
                let scratch = Scratch::create(&a.postgres, "load").await?;
                let dir = tempfile::tempdir()?;
                let result = load_engine("PostgreSQL", &scratch.url, dir.path(), a, &plan).await;
                scratch.drop_now().await?;
                result?
            }
            other => bail!("unknown engine {other:?}: use sqlite or postgres"),
        };
        rows.push(row);
    }
    Ok(rows)
}

async fn load_engine(
    label: &'static str,
    url: &str,
    data_dir: &Path,
    a: &LoadArgs,
    plan: &crate::loadgen::Plan,
) -> anyhow::Result<LoadRow> {
    eprintln!("{label}: registering {} lines", a.lines);
    let db = Db::connect(url).await?;
    db.migrate().await?;
    let fixture = crate::loadgen::prepare(&db, a.lines, a.electrodes).await?;
    let env: Vec<(String, String)> = load_limits(a, plan.uploads)
        .iter()
        .map(|(k, v)| (format!("OHMLINE_LIMITS__{}", k.to_uppercase()), v.to_string()))
        .collect();
    let server = ServeProcess::start(url, data_dir, "api", &env).await?;
    eprintln!(
        "{label}: {} uploads at {}/s and {} reads at {}/s against ohmline serve --role api",
        plan.uploads,
        plan.uploads_per_s,
        plan.reads(),
        plan.reads_per_s
    );
    let result = crate::loadgen::run(&server.base, &fixture, plan).await;
    server.stop().await?;
    let report = result?;
    let stored = db::epochs::backlog(&db).await?;
    db.close().await;
    for e in report.upload_errors.iter().chain(&report.read_errors).take(5) {
        eprintln!("{label}: error: {e}");
    }
    Ok(LoadRow { engine: label, report, stored })
}

fn load_figure(r: &LoadRow) -> String {
    let p = &r.report;
    format!(
        "{:.1}/s offered, {:.1}/s achieved; ack p50 {:.0} ms, p99 {:.0} ms; reads p50 {:.0} ms, p99 {:.0} ms; {} errors",
        p.offered_uploads_per_s,
        p.achieved_uploads_per_s,
        p.upload_p(0.5),
        p.upload_p(0.99),
        p.read_p(0.5),
        p.read_p(0.99),
        p.errors()
    )
}

fn print_load(a: &LoadArgs, rows: &[LoadRow]) {
    let plan = load_plan(a).expect("checked before the run");
    let readings = crate::loadgen::flat_line(a.electrodes).map(|(_, _, s)| s.len()).unwrap_or(0);
    println!();
    println!(
        "load on loopback: {} lines, {} uploads of {readings}-reading CSV epochs offered at {}/s ({:.0} s), {} reads offered at {}/s",
        a.lines,
        plan.uploads,
        a.rate,
        plan.duration_s(),
        plan.reads(),
        a.reads
    );
    println!(
        "server: ohmline serve --role api (no job workers, no email) in its own process; limits: {}",
        load_limits(a, plan.uploads)
            .iter()
            .map(|(k, v)| format!("{k} = {v}"))
            .collect::<Vec<_>>()
            .join(", ")
    );
    println!(
        "{:<11} {:>9} {:>10} {:>11} {:>11} {:>11} {:>11} {:>7} {:>11} {:>11} {:>7} {:>7}",
        "engine",
        "uploads",
        "offered/s",
        "achieved/s",
        "ack p50 ms",
        "ack p99 ms",
        "ack max ms",
        "reads",
        "read p50 ms",
        "read p99 ms",
        "errors",
        "stored"
    );
    for r in rows {
        let p = &r.report;
        println!(
            "{:<11} {:>9} {:>10.1} {:>11.1} {:>11.1} {:>11.1} {:>11.1} {:>7} {:>11.1} {:>11.1} {:>7} {:>7}",
            r.engine,
            p.acked.len(),
            p.offered_uploads_per_s,
            p.achieved_uploads_per_s,
            p.upload_p(0.5),
            p.upload_p(0.99),
            p.upload_p(1.0),
            p.read_ms.len(),
            p.read_p(0.5),
            p.read_p(0.99),
            p.errors(),
            r.stored
        );
    }
    println!(
        "uploads = acknowledged (201); stored = epochs waiting for processing afterwards (the api role processes none); reads take turns over {}",
        crate::loadgen::READS.join(", ")
    );
}
