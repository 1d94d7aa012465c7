//! `ohmline demo`: an invented flood season end to end on SQLite.
//!
//! Creates a data folder with a configuration, an embedded database, an admin
//! user, an invented site with two lines, their sequences, upload tokens and a
//! recipient of alert emails (written as `.eml` files into `DIR/outbox/`);
//! starts the same service as `ohmline serve`; runs the simulated meter
//! ([`crate::demo::meter`]), which only talks HTTP and also reports the site's
//! river stage and rainfall; and reports each epoch and
//! alert as the service processes them, reading the public API with the admin's
//! personal token.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Duration;

use anyhow::{Context, bail};
use chrono::{DateTime, Datelike, Timelike, Utc};
use clap::Args;
use indicatif::{ProgressBar, ProgressStyle};
use ohmline_core::alerts::{RuleSet, StageRule};
use ohmline_core::scenario::{self, DemoLine, Scenario, ScenarioParams};
use ohmline_core::temperature::SeasonalParams;
use tokio::net::TcpListener;
use tokio::sync::{mpsc, watch};

use crate::auth::Role;
use crate::auth::password::generate_password;
use crate::config::{CapStatus, ChangeMode, Config};
use crate::db::lines::{NewElectrode, NewLine};
use crate::db::recipients::{Delivery, NewRecipient};
use crate::db::{self, Db};
use crate::demo::meter::{Meter, MeterEvent, MeterLine, MeterSettings};
use crate::demo::{self as world, CREST_LINE, CROSS_LINE};

/// The file that marks a folder as holding a demo.
const MARKER: &str = "ohmline-demo.txt";
/// Sign-in name of the demo's admin.
pub const ADMIN_EMAIL: &str = "admin@pellingford.example";
/// Recipient of the demo's alert emails.
const DUTY_EMAIL: &str = "duty-engineer@pellingford.example";
/// Name of the invented site.
pub const SITE_NAME: &str = "Pellingford levee (invented)";
/// The site's description: says the world is invented.
pub const INVENTED_NOTE: &str = "An invented levee on the invented River Thaddle at the invented town of Pellingford. \
Every place, reading and alert here is simulated by `ohmline demo`; none of it describes a real embankment.";
/// Simulated time between epochs.
const INTERVAL_H: i64 = 6;

/// How fast the simulated meter sends.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Speed {
    /// Epochs per real minute (per line).
    PerMinute(f64),
    /// Each epoch as soon as it is computed.
    Max,
}

fn parse_speed(s: &str) -> Result<Speed, String> {
    if s.eq_ignore_ascii_case("max") {
        return Ok(Speed::Max);
    }
    match s.parse::<f64>() {
        Ok(v) if v.is_finite() && v > 0.0 => Ok(Speed::PerMinute(v)),
        _ => Err(format!("{s:?} is neither a positive number of epochs per minute nor \"max\"")),
    }
}

/// `ohmline demo` options.
#[derive(Debug, Args)]
pub struct DemoArgs {
    /// Folder for the demo's database, configuration and outbox.
    #[arg(long, default_value = "./ohmline-demo", value_name = "DIR")]
    pub data_dir: PathBuf,
    /// Delete a previous demo in DIR first (only a folder made by `ohmline demo`).
    #[arg(long)]
    pub reset: bool,
    /// Address to listen on (port 0 picks a free port).
    #[arg(long, default_value = "127.0.0.1:8080", value_name = "ADDR")]
    pub listen: String,
    /// Epochs per real minute per line (each epoch is 6 h of the season, so
    /// 12 shows three simulated days a minute), or `max` for as fast as the
    /// forward model computes them.
    #[arg(long, default_value = "12", value_parser = parse_speed)]
    pub speed: Speed,
    /// Epochs per line (at least 4); the seepage opens at epoch N/2.
    #[arg(long, default_value_t = 30)]
    pub epochs: usize,
    /// Seed of the rain, noise, spikes and faults.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Stop once every epoch is processed (or failed) instead of serving
    /// until Ctrl-C.
    #[arg(long)]
    pub exit_when_done: bool,
    /// A season without the seepage path (river stage, rain, temperature,
    /// noise and faults only): every zone alert is then a false alarm.
    #[arg(long)]
    pub no_seepage: bool,
}

/// Checks DIR: absent, empty, or a previous demo (deleted with `--reset`).
fn prepare_dir(dir: &Path, reset: bool) -> anyhow::Result<()> {
    if !dir.exists() {
        return std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()));
    }
    let empty = std::fs::read_dir(dir)
        .with_context(|| format!("reading {}", dir.display()))?
        .next()
        .is_none();
    if empty {
        return Ok(());
    }
    let marker = dir.join(MARKER);
    if !marker.exists() {
        bail!(
            "{} is not empty and holds no ohmline demo (no {MARKER}); it is left untouched — choose another --data-dir",
            dir.display()
        );
    }
    let about = std::fs::read_to_string(&marker).unwrap_or_default();
    let about = about.lines().next().unwrap_or("").to_string();
    if !reset {
        bail!(
            "{} already holds an ohmline demo ({about}); run again with --reset to delete it and start over, or choose another --data-dir",
            dir.display()
        );
    }
    std::fs::remove_dir_all(dir).with_context(|| format!("deleting {}", dir.display()))?;
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    println!("deleted the previous demo in {} ({about})", dir.display());
    Ok(())
}

/// The demo's configuration: SQLite under DIR, no SMTP (emails become `.eml`
/// files in DIR/outbox), ratio change only, the scenario's temperature model.
fn demo_config(dir: &Path, listen: &str) -> Config {
    let mut c =
        Config { data_dir: dir.to_path_buf(), listen: listen.to_string(), ..Config::default() };
    c.notify.from = "Pellingford levee duty demo <ohmline-demo@pellingford.example>".into();
    c.notify.poll_interval_s = 1.0;
    c.notify.cap.status = CapStatus::Test;
    c.notify.cap.sender_name = "ohmline demo (invented Pellingford levee authority)".into();
    c.processing.change_modes = vec![ChangeMode::Ratio];
    c
}

fn seasonal(c: &Config) -> SeasonalParams {
    let t = &c.processing.temperature;
    SeasonalParams {
        mean_c: t.mean_c,
        amplitude_c: t.amplitude_c,
        t_min_day: t.peak_day - 365.0 / 2.0,
        damping_depth_m: t.damping_depth_m,
        period_days: 365.0,
    }
}

/// Day of the year (1 = 1 January, fractional) of a time.
fn day_of_year(t: DateTime<Utc>) -> f64 {
    t.ordinal() as f64 + t.num_seconds_from_midnight() as f64 / 86_400.0
}

/// What the setup made.
struct World {
    site_id: i64,
    password: String,
    api_token: String,
    lines: Vec<MeterLine>,
}

async fn create_world(db: &Db) -> anyhow::Result<World> {
    let password = generate_password();
    let admin = super::user::add_user(db, ADMIN_EMAIL, Role::Admin, &password).await?;
    let (_, api_token) = super::user::issue_token(db, &admin, "ohmline demo progress").await?;
    let site = db::sites::create(db, SITE_NAME, INVENTED_NOTE).await?;
    db::audit::record(db, "cli", "site.add", &site.name, "demo").await?;
    let address: lettre::Address = DUTY_EMAIL.parse().expect("valid address");
    db::recipients::add(
        db,
        &NewRecipient {
            email: &address,
            name: "Duty engineer (invented)",
            site_id: Some(site.id),
            min_level: 0,
            delivery: Delivery::PerEvent,
        },
    )
    .await?;
    let (cross_geometry, cross_points) = scenario::cross_line();
    let specs = [
        (
            DemoLine::Crest,
            CREST_LINE,
            "longitudinal",
            scenario::crest_line(),
            Vec::new(),
            "Invented demo line: 64 electrodes 1 m apart along the crest centre, chainage 0–63 m.",
            chrono::Duration::zero(),
        ),
        (
            DemoLine::Cross,
            CROSS_LINE,
            "transverse",
            cross_geometry,
            cross_points,
            "Invented demo line: 48 electrodes 0.5 m apart across the levee at crest chainage 41 m of pellingford-crest; river side at small chainage, waterside toe at 5 m, crest 11.25–15.25 m, landside toe 21.5 m (1:2.5 slopes); the site's river gauge reads on the lines' elevation datum (toes at 0 m), as its river-stage rule needs.",
            chrono::Duration::minutes(20),
        ),
    ];
    let mut lines = Vec::new();
    for (kind, name, orientation, geometry, points, notes, offset) in specs {
        let sequence = Arc::new(world::sequence(kind));
        let electrodes: Vec<NewElectrode> = geometry
            .electrodes()
            .iter()
            .map(|e| NewElectrode {
                label: e.label().to_string(),
                x: e.x(),
                z: e.z(),
                easting: None,
                northing: None,
            })
            .collect();
        let (line, _) = db::lines::create(
            db,
            &NewLine {
                site_id: site.id,
                name,
                orientation,
                expected_interval_s: INTERVAL_H * 3600,
                notes,
                electrodes: &electrodes,
                sequence: Some(("wenner-dd-gradient-reciprocals", &sequence)),
            },
        )
        .await?;
        db::audit::record(db, "cli", "line.register", name, "demo").await?;
        if !points.is_empty() {
            db::models::set_surface_points(db, line.id, &points).await?;
        }
        if kind == DemoLine::Cross {
            // Across the levee the river stage soaks the waterside and raises
            // the phreatic surface under the crest: the river-stage rule
            // reports that as the wetting notice. The site's gauge reads the
            // stage above the toe, which is elevation 0 of both lines.
            let rules = RuleSet { stage: Some(StageRule { margin_m: 0.5 }), ..RuleSet::default() };
            let version = db::rules::set(db, line.id, &rules, "demo").await?;
            db::audit::record(
                db,
                "cli",
                "line.rules",
                name,
                &format!(
                    "version {version}: default rules with the river-stage rule (margin 0.5 m)"
                ),
            )
            .await?;
        }
        let token = super::admin::issue_line_token(db, &line, "simulated meter").await?;
        lines.push(MeterLine {
            kind,
            name: name.to_string(),
            token,
            geometry,
            surface_points: points,
            sequence,
            offset,
        });
    }
    Ok(World { site_id: site.id, password, api_token, lines })
}

/// Runs the demo.
pub async fn run(args: DemoArgs) -> anyhow::Result<()> {
    if args.epochs < 4 {
        bail!(
            "--epochs must be at least 4 (a quiet baseline, then the flood), got {}",
            args.epochs
        );
    }
    let dir = std::path::absolute(&args.data_dir)
        .with_context(|| format!("resolving {}", args.data_dir.display()))?;
    prepare_dir(&dir, args.reset)?;
    let listener = TcpListener::bind(&args.listen)
        .await
        .with_context(|| format!("listening on {}", args.listen))?;
    let addr = listener.local_addr()?;
    let base = format!("http://{addr}");
    let mut config = demo_config(&dir, &addr.to_string());
    config.notify.public_base_url = base.clone();
    let toml = toml::to_string(&config).context("writing the demo configuration")?;
    // The written file must read back as the same, valid configuration.
    let config = Config::from_toml(&toml).context("checking the demo configuration")?;
    let config_path = dir.join("ohmline.toml");
    std::fs::write(&config_path, format!("# Written by `ohmline demo`; serve the demo again with\n# ohmline serve --config {}\n{toml}", config_path.display()))
        .with_context(|| format!("writing {}", config_path.display()))?;
    let now = Utc::now();
    std::fs::write(
        dir.join(MARKER),
        format!(
            "created {} with {} epochs per line, seed {}\nThis folder holds an invented demo of ohmline; `ohmline demo --reset` deletes it.\n",
            now.to_rfc3339(),
            args.epochs,
            args.seed
        ),
    )?;

    let db = super::open_db(&config).await?;
    let world = create_world(&db).await?;

    let first_start = now
        .with_minute(0)
        .and_then(|t| t.with_second(0))
        .and_then(|t| t.with_nanosecond(0))
        .unwrap_or(now)
        - chrono::Duration::hours(INTERVAL_H * (args.epochs as i64 - 1));
    let t = &config.processing.temperature;
    let scenario = Arc::new(Scenario::new(ScenarioParams {
        n_epochs: args.epochs,
        interval_days: INTERVAL_H as f64 / 24.0,
        start_day: day_of_year(first_start),
        seed: args.seed,
        temperature: seasonal(&config),
        alpha_per_c: t.alpha_per_c,
        reference_c: t.reference_c,
        seepage: !args.no_seepage,
    })?);

    let (stop_tx, stop_rx) = watch::channel(false);
    let mut service_stop = stop_rx.clone();
    let service = super::serve::start(
        config.clone(),
        db.clone(),
        listener,
        super::serve::Role::All,
        async move {
            let _ = service_stop.wait_for(|s| *s).await;
        },
    )?;
    {
        let stop_tx = stop_tx.clone();
        tokio::spawn(async move {
            super::serve::shutdown_signal().await;
            let _ = stop_tx.send(true);
        });
    }

    let truth = scenario.seepage_truth();
    println!("ohmline demo listening on {base}");
    println!("  sign in at {base}/ as {ADMIN_EMAIL} with password {}", world.password);
    println!("  data folder {}  (alert emails: {})", dir.display(), config.outbox_dir().display());
    if args.no_seepage {
        println!(
            "  an invented season: {} epochs per line, every {INTERVAL_H} h from {}; no seepage: river stage, rain and temperature only",
            args.epochs,
            first_start.format("%Y-%m-%d %H:%M UTC"),
        );
    } else {
        println!(
            "  an invented season: {} epochs per line, every {INTERVAL_H} h from {}; the seepage opens at epoch {} and is hidden until the pipeline finds it",
            args.epochs,
            first_start.format("%Y-%m-%d %H:%M UTC"),
            scenario.onset_epoch() + 1
        );
    }
    tracing::debug!(?truth, "seepage ground truth");

    let (ev_tx, ev_rx) = mpsc::unbounded_channel();
    let meter = Meter::new(
        scenario.clone(),
        world.lines.clone(),
        MeterSettings {
            base_url: base.clone(),
            pace: match args.speed {
                Speed::Max => None,
                Speed::PerMinute(v) => Some(Duration::from_secs_f64(60.0 / v)),
            },
            first_start,
            interval: chrono::Duration::hours(INTERVAL_H),
            seed: args.seed,
            site: Some(world.site_id.to_string()),
        },
    );
    let meter_task = {
        let (stop_tx, stop_rx) = (stop_tx.clone(), stop_rx.clone());
        tokio::spawn(async move {
            let r = meter.run(ev_tx, stop_rx).await;
            if r.is_err() {
                let _ = stop_tx.send(true);
            }
            r
        })
    };

    let names: Vec<String> = world.lines.iter().map(|l| l.name.clone()).collect();
    let progress = Progress::new(base.clone(), world.api_token.clone(), names, args.epochs);
    let outcome = progress.follow(ev_rx, stop_rx.clone(), &scenario).await;
    if outcome.is_err() {
        let _ = stop_tx.send(true);
    }
    if let Err(e) = meter_task.await.context("the meter task panicked")? {
        let _ = stop_tx.send(true);
        service.wait().await?;
        return Err(e).context("the simulated meter stopped");
    }
    match outcome {
        Ok(summary) => {
            let emails = wait_for_outbox(&db, &config.outbox_dir()).await?;
            println!();
            println!(
                "season done: {} epochs processed, {} failed",
                summary.processed, summary.failed
            );
            println!("  alerts raised: {}", summary.alerts);
            if summary.alerts > 0 {
                println!("  {}", ohmline_core::alerts::CAUTION);
            }
            println!(
                "  emails in the outbox: {emails} (.eml files in {})",
                config.outbox_dir().display()
            );
            println!(
                "  look at {base}/ (sign in as {ADMIN_EMAIL}); the overview lists the lines and their alerts"
            );
            if args.exit_when_done {
                let _ = stop_tx.send(true);
            } else {
                println!("serving until Ctrl-C");
            }
        }
        Err(e) => {
            let _ = stop_tx.send(true);
            service.wait().await?;
            return Err(e);
        }
    }
    service.wait().await
}

/// Waits (up to 30 s) until no email is pending, then counts the `.eml` files.
async fn wait_for_outbox(db: &Db, dir: &Path) -> anyhow::Result<usize> {
    for _ in 0..60 {
        if db::outbox::list(db, Some("pending")).await?.is_empty() {
            break;
        }
        tokio::time::sleep(Duration::from_millis(500)).await;
    }
    Ok(match std::fs::read_dir(dir) {
        Ok(entries) => entries
            .filter_map(Result::ok)
            .filter(|e| e.path().extension().is_some_and(|x| x == "eml"))
            .count(),
        Err(_) => 0,
    })
}

/// Follows the season through the public API.
struct Progress {
    base: String,
    token: String,
    lines: Vec<String>,
    n_epochs: usize,
    client: reqwest::Client,
}

/// How the season ended.
struct Summary {
    processed: usize,
    failed: usize,
    alerts: usize,
}

impl Progress {
    fn new(base: String, token: String, lines: Vec<String>, n_epochs: usize) -> Self {
        Self { base, token, lines, n_epochs, client: reqwest::Client::new() }
    }

    async fn get(&self, path: &str) -> anyhow::Result<(u16, serde_json::Value)> {
        let r = self
            .client
            .get(format!("{}{path}", self.base))
            .bearer_auth(&self.token)
            .send()
            .await
            .with_context(|| format!("GET {path}"))?;
        let status = r.status().as_u16();
        Ok((status, r.json().await.unwrap_or_default()))
    }

    /// Prints a line per epoch status and per alert until every epoch is
    /// `processed` or `failed` (or `stop`).
    async fn follow(
        &self,
        mut events: mpsc::UnboundedReceiver<MeterEvent>,
        mut stop: watch::Receiver<bool>,
        scenario: &Scenario,
    ) -> anyhow::Result<Summary> {
        let total = self.n_epochs * self.lines.len();
        let bar = ProgressBar::new(total as u64);
        bar.set_style(
            ProgressStyle::with_template("{bar:40} {pos}/{len} epochs processed  {msg}")
                .expect("valid template"),
        );
        let say = |s: String| bar.suspend(|| println!("{s}"));
        // epoch id → (line, index)
        let mut known: BTreeMap<i64, (String, usize)> = BTreeMap::new();
        let mut status: BTreeMap<i64, String> = BTreeMap::new();
        let mut seen_alerts: BTreeSet<i64> = BTreeSet::new();
        let mut alerts_missing = false;
        let (mut uploaded, mut forward_total) = (0usize, 0.0f64);
        loop {
            while let Ok(MeterEvent::Uploaded { line, epoch, epoch_id, started_at, forward_s }) =
                events.try_recv()
            {
                uploaded += 1;
                forward_total += forward_s;
                known.insert(epoch_id, (line.clone(), epoch));
                let st = scenario.state(epoch);
                let mut what = format!("river {:.1} m", st.stage_m);
                if st.wetting > 0.02 {
                    what.push_str(", rain");
                }
                if crate::demo::meter::electrode_failing(
                    if line == CREST_LINE { DemoLine::Crest } else { DemoLine::Cross },
                    epoch,
                    self.n_epochs,
                ) {
                    what.push_str(", electrode 13 failing");
                }
                say(format!(
                    "uploaded  {line:<18} epoch {:>3}/{}  {}  ({what}; forward model {:.1} s)",
                    epoch + 1,
                    self.n_epochs,
                    started_at.format("%Y-%m-%d %H:%M"),
                    forward_s
                ));
            }
            for line in &self.lines {
                let (code, page) =
                    self.get(&format!("/api/v1/lines/{line}/epochs?limit=500")).await?;
                if code != 200 {
                    bail!("GET /api/v1/lines/{line}/epochs answered {code}: {page}");
                }
                // The API lists newest first; progress reads oldest first.
                for e in page["epochs"].as_array().into_iter().flatten().rev() {
                    let (Some(id), Some(s)) = (e["id"].as_i64(), e["status"].as_str()) else {
                        continue;
                    };
                    if status.get(&id).map(String::as_str) == Some(s) {
                        continue;
                    }
                    status.insert(id, s.to_string());
                    if s != "received" {
                        let (l, k) = known.get(&id).cloned().unwrap_or((line.clone(), 0));
                        say(format!("{s:<9} {l:<18} epoch {:>3}/{}", k + 1, self.n_epochs));
                    }
                }
                let (code, alerts) =
                    self.get(&format!("/api/v1/alerts?line={line}&state=raised")).await?;
                if code == 404 && !alerts_missing {
                    alerts_missing = true;
                    say("(this server has no alerts API yet: alerts are not listed here)".into());
                }
                for a in alerts["alerts"].as_array().into_iter().flatten() {
                    let Some(id) = a["id"].as_i64() else { continue };
                    if seen_alerts.insert(id) {
                        let ch = &a["chainage_m"];
                        let num = |v: &serde_json::Value| {
                            v.as_f64().map_or_else(|| "?".to_string(), |x| format!("{x:.1}"))
                        };
                        // A line-wide notice has no chainage range.
                        let place = match (ch[0].as_f64(), ch[1].as_f64()) {
                            (Some(a), Some(b)) => format!("chainage {a:.1}–{b:.1} m, "),
                            _ => String::new(),
                        };
                        say(format!(
                            "ALERT     {line:<18} {} — {} ({place}peak change {} %), raised {}",
                            a["level_label"].as_str().unwrap_or("?"),
                            a["subject"].as_str().unwrap_or(""),
                            num(&a["peak_change_pct"]),
                            a["raised_at"].as_str().unwrap_or("")
                        ));
                        if seen_alerts.len() == 1 {
                            say(format!("          {}", ohmline_core::alerts::CAUTION));
                        }
                    }
                }
            }
            let done: Vec<&String> =
                status.values().filter(|s| *s == "processed" || *s == "failed").collect();
            bar.set_position(done.len() as u64);
            bar.set_message(format!(
                "{uploaded}/{total} uploaded (forward model {:.1} s each), {} alerts",
                if uploaded > 0 { forward_total / uploaded as f64 } else { 0.0 },
                seen_alerts.len()
            ));
            if status.len() == total && done.len() == total {
                bar.finish_and_clear();
                let failed = done.iter().filter(|s| **s == "failed").count();
                return Ok(Summary {
                    processed: total - failed,
                    failed,
                    alerts: seen_alerts.len(),
                });
            }
            tokio::select! {
                _ = tokio::time::sleep(Duration::from_millis(500)) => {}
                _ = stop.changed() => {
                    bar.abandon();
                    bail!("stopped before the season was processed");
                }
            }
        }
    }
}
