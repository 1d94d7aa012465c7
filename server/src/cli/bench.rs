//! `ohmline bench`: measurements of the running service (not tests).
//!
//! `bench ingest` starts the real HTTP service in this process on a loopback port
//! over a fresh database of each engine and uploads 2,000-reading CSV epochs
//! through the real API: first one at a time (throughput), then from several
//! concurrent uploaders (acknowledgement latency, median and 99th percentile).

use std::path::PathBuf;
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::{Context, bail};
use chrono::{TimeZone, Utc};
use clap::{Args, Subcommand};
use ohmline_core::geometry::{Electrode, LineGeometry};
use ohmline_core::sequence::{Quadrupole, Sequence, geometric_factor_flat};
use tokio::net::TcpListener;

use crate::app::{AppState, serve};
use crate::auth::{hash_token, new_line_token};
use crate::config::Config;
use crate::db::lines::{NewElectrode, NewLine};
use crate::db::{self, Db};

/// `ohmline bench …`
#[derive(Debug, Subcommand)]
pub enum BenchCmd {
    /// Readings per second and acknowledgement latency of epoch uploads.
    Ingest(IngestArgs),
}

/// Options of `ohmline bench ingest`.
#[derive(Debug, Args)]
pub struct IngestArgs {
    /// Engines to measure: sqlite, postgres or both (comma-separated).
    #[arg(long, default_value = "sqlite,postgres")]
    pub engines: String,
    /// PostgreSQL server to create a scratch database on.
    #[arg(long, default_value = "postgres://postgres@127.0.0.1:5432/postgres")]
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

/// Runs a benchmark.
pub async fn run(cmd: BenchCmd) -> anyhow::Result<()> {
    match cmd {
        BenchCmd::Ingest(args) => ingest(args).await,
    }
}

struct Row {
    engine: &'static str,
    readings_per_s: f64,
    epoch_ms_median: f64,
    concurrent_readings_per_s: f64,
    p50_ms: f64,
    p99_ms: f64,
}

async fn ingest(args: IngestArgs) -> anyhow::Result<()> {
    let mut rows = Vec::new();
    for engine in args.engines.split(',').map(str::trim) {
        let row = match engine {
            "sqlite" => {
                let dir = tempfile::tempdir()?;
                let url = format!("sqlite://{}", dir.path().join("bench.sqlite").display());
                bench_engine("SQLite", &url, &args).await?
            }
            "postgres" => {
                let name = format!("ohmline_bench_{}", std::process::id());
                let admin =
                    Db::connect(&args.postgres).await.context("connecting to PostgreSQL")?;
                let Db::Postgres(pool) = &admin else {
                    bail!("--postgres must be a postgres:// URL")
                };
                sqlx::query(&format!("DROP DATABASE IF EXISTS {name}")).execute(pool).await?;
                sqlx::query(&format!("CREATE DATABASE {name}")).execute(pool).await?;
                let base = args.postgres.rsplit_once('/').map(|(b, _)| b).unwrap_or(&args.postgres);
                let result = bench_engine("PostgreSQL", &format!("{base}/{name}"), &args).await;
                sqlx::query(&format!("DROP DATABASE IF EXISTS {name} WITH (FORCE)"))
                    .execute(pool)
                    .await?;
                admin.close().await;
                result?
            }
            other => bail!("unknown engine {other:?}: use sqlite or postgres"),
        };
        rows.push(row);
    }
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
    Ok(())
}

/// A flat 96-electrode line at 1 m with Wenner (a = 1…15) and dipole–dipole
/// (a = 1…2, n = 1…6) quadrupoles, cut to `n` quadrupoles.
fn bench_line(n: usize) -> anyhow::Result<(Vec<NewElectrode>, LineGeometry, Sequence)> {
    let ne = 96;
    let electrodes: Vec<NewElectrode> = (0..ne)
        .map(|i| NewElectrode {
            label: format!("{}", i + 1),
            x: i as f64,
            z: 0.0,
            easting: None,
            northing: None,
        })
        .collect();
    let geometry =
        LineGeometry::new(electrodes.iter().map(|e| Electrode::new(&e.label, e.x, e.z)).collect())?;
    let mut q = Vec::new();
    for a in 1..=15 {
        for i in 0..ne - 3 * a {
            q.push(Quadrupole::new(i, i + 3 * a, i + a, i + 2 * a));
        }
    }
    for a in 1..=2 {
        for k in 1..=6 {
            for i in 0..ne - (k + 2) * a {
                q.push(Quadrupole::new(i, i + a, i + (k + 1) * a, i + (k + 2) * a));
            }
        }
    }
    if q.len() < n {
        bail!(
            "the bench line has only {} quadrupoles; ask for at most that many readings",
            q.len()
        );
    }
    q.truncate(n);
    Ok((electrodes, geometry.clone(), Sequence::new(q, ne)?))
}

fn epoch_csv(geometry: &LineGeometry, seq: &Sequence, k: usize) -> String {
    let t = Utc.with_ymd_and_hms(2026, 1, 1, 0, 0, 0).unwrap() + chrono::Duration::hours(k as i64);
    let mut s = format!(
        "# started_at: {}\na,b,m,n,current_ma,voltage_mv,stack_error_pct\n",
        t.to_rfc3339()
    );
    let label = |i: Option<usize>| {
        i.map(|i| geometry.electrodes()[i].label().to_string()).unwrap_or_default()
    };
    for (i, q) in seq.quadrupoles().iter().enumerate() {
        let kf = geometric_factor_flat(geometry, q).unwrap_or(1.0);
        let r = 100.0 / kf * (1.0 + 1e-3 * ((i + k) % 7) as f64);
        s.push_str(&format!(
            "{},{},{},{},100,{:.5},0.3\n",
            label(Some(q.a)),
            label(q.b),
            label(Some(q.m)),
            label(q.n),
            r * 100.0
        ));
    }
    s
}

fn percentile(sorted: &[f64], p: f64) -> f64 {
    let i = ((sorted.len() as f64 - 1.0) * p).round() as usize;
    sorted[i.min(sorted.len() - 1)]
}

async fn bench_engine(label: &'static str, url: &str, args: &IngestArgs) -> anyhow::Result<Row> {
    eprintln!("{label}: preparing");
    let db = Db::connect(url).await?;
    db.migrate().await?;
    let site = db::sites::create(&db, "Bench reach", "benchmark data").await?;
    let (electrodes, geometry, seq) = bench_line(args.readings)?;
    let (line, _) = db::lines::create(
        &db,
        &NewLine {
            site_id: site.id,
            name: "bench",
            orientation: "longitudinal",
            expected_interval_s: 3600,
            notes: "",
            electrodes: &electrodes,
            sequence: Some(("bench", &seq)),
        },
    )
    .await?;
    let token = new_line_token();
    db::tokens::insert(&db, line.id, &hash_token(&token), "bench").await?;

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
        Arc::new((0..total).map(|k| epoch_csv(&geometry, &seq, k)).collect());
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
