//! Alert emails end to end: recipients by the CLI, notices written to the outbox
//! of a real database, the real `ohmline serve` delivering to a real SMTP server
//! on loopback — through an SMTP outage and a server restart — and `.eml` files
//! when no SMTP server is configured; on SQLite and PostgreSQL.

use std::collections::{BTreeMap, HashSet};
use std::time::{Duration, Instant};

use chrono::{TimeZone, Utc};
use mail_parser::{MessageParser, MimeHeaders};
use ohmline_server::db::{self, Db};
use ohmline_server::notify::{
    AlertEvent, AlertKind, AlertNotice, CAUTION, EnqueueParams, NewNotice, enqueue,
};

use crate::on_both_engines;
use crate::support::{Engine, ReceivedMail, Server, SmtpSink, TestDb, cli, cli_output};

/// Bytes that start with the PNG signature (the figures' content is opaque to
/// notifications), distinct per `tag`.
fn png(tag: u8) -> Vec<u8> {
    let mut v = vec![0x89, b'P', b'N', b'G', 0x0D, 0x0A, 0x1A, 0x0A];
    v.extend(std::iter::repeat_n(tag, 300));
    v
}

fn notice(alert_id: i64, event: AlertEvent, rank: u8) -> AlertNotice {
    let t = |d: u32, h: u32| Utc.with_ymd_and_hms(2026, 3, d, h, 0, 0).unwrap();
    let event_at = match event {
        AlertEvent::Raised => t(3, 6),
        AlertEvent::Escalated => t(3, 12),
        _ => t(4, 6),
    };
    AlertNotice::new(NewNotice {
        alert_id,
        event,
        site: "Levee North".into(),
        line: "crest-a".into(),
        level_rank: rank,
        level_label: format!("level {rank}"),
        kind: AlertKind::DropZone,
        summary: "Resistivity dropped in a confined zone.".into(),
        chainage_m: Some((24.0, 28.0)),
        depth_m: Some((1.5, 4.0)),
        area_m2: Some(6.5),
        peak_change_pct: Some(-27.3),
        since: t(1, 6),
        raised_at: t(3, 6),
        event_at,
        epoch_at: event_at,
        persistence_epochs: 3,
        good_sensitivity_share: Some(0.8),
        actor: None,
        link: format!("https://levees.example.org/alerts/{alert_id}"),
        section_png: Some(png(1)),
        history_png: Some(png(2)),
    })
    .unwrap()
}

fn params() -> EnqueueParams {
    EnqueueParams {
        max_per_hour: 2,
        message_id_domain: "levees.example.org".into(),
        now: Utc::now(),
    }
}

/// A parsed email: recipient → (subject, Message-ID, text, html, attachments).
struct Mail {
    to: String,
    subject: String,
    message_id: String,
    text: String,
    html: String,
    attachments: Vec<(String, Vec<u8>)>,
}

fn parse(raw: &[u8], envelope_to: Option<&[String]>) -> Mail {
    let m = MessageParser::default().parse(raw).expect("a MIME message");
    let to = match envelope_to {
        Some(to) => {
            assert_eq!(to.len(), 1, "one recipient per message");
            to[0].trim_matches(['<', '>']).to_string()
        }
        None => m.to().and_then(|a| a.first()).and_then(|a| a.address()).unwrap().to_string(),
    };
    Mail {
        to,
        subject: m.subject().unwrap_or_default().to_string(),
        message_id: format!("<{}>", m.message_id().expect("Message-ID")),
        text: m.body_text(0).expect("text part").to_string(),
        html: m.body_html(0).expect("HTML part").to_string(),
        attachments: m
            .attachments()
            .map(|a| (a.attachment_name().unwrap_or_default().to_string(), a.contents().to_vec()))
            .collect(),
    }
}

fn parse_all(mails: &[ReceivedMail]) -> Vec<Mail> {
    mails.iter().map(|m| parse(&m.data, Some(&m.to))).collect()
}

/// Checks an alert email: subject, the chainage and the caution in both parts,
/// the figures attached unchanged.
fn check_alert(m: &Mail, subject: &str) {
    assert_eq!(m.subject, subject, "to {}", m.to);
    for (part, body) in [("text", &m.text), ("HTML", &m.html)] {
        assert!(body.contains(CAUTION), "{part} part to {} lacks the caution", m.to);
        assert!(body.contains("chainage 24\u{2013}28 m"), "{part} part lacks the chainage");
    }
    assert_eq!(
        m.attachments,
        [("section.png".to_string(), png(1)), ("history.png".to_string(), png(2))],
        "to {}",
        m.to
    );
}

const RAISED: &str =
    "[ohmline] Level 2 \u{2014} Levee North / crest-a \u{2014} chainage 24\u{2013}28 m";
const ESCALATED: &str = "[ohmline] Escalated to level 3 \u{2014} Levee North / crest-a \u{2014} chainage 24\u{2013}28 m";
const RESOLVED: &str =
    "[ohmline] Resolved: level 3 \u{2014} Levee North / crest-a \u{2014} chainage 24\u{2013}28 m";

/// Waits until every outbox row in `ids` has failed at least `attempts` times.
async fn wait_for_attempts(conn: &Db, ids: &[i64], attempts: i64) {
    let deadline = Instant::now() + Duration::from_secs(20);
    loop {
        let rows = db::outbox::list(conn, Some("pending")).await.unwrap();
        let retried = ids.iter().all(|id| {
            rows.iter().any(|r| r.id == *id && r.attempts >= attempts && r.last_error.is_some())
        });
        if retried {
            return;
        }
        assert!(Instant::now() < deadline, "no retries seen: {rows:?}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
}

/// Waits until `n` outbox rows are marked sent.
async fn wait_for_sent(conn: &Db, n: usize) {
    let deadline = Instant::now() + Duration::from_secs(20);
    loop {
        let sent = db::outbox::list(conn, Some("sent")).await.unwrap();
        if sent.len() >= n {
            return;
        }
        assert!(Instant::now() < deadline, "{} of {n} rows marked sent", sent.len());
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// Subjects received per address, in order.
fn by_address(mails: &[Mail]) -> BTreeMap<String, Vec<String>> {
    let mut out: BTreeMap<String, Vec<String>> = BTreeMap::new();
    for m in mails {
        out.entry(m.to.clone()).or_default().push(m.subject.clone());
    }
    out
}

fn register_recipients(db: &TestDb) {
    cli(db, &["site", "add", "Levee North"]);
    cli(db, &["site", "add", "Levee South"]);
    for args in [
        &[
            "duty@levees.example.org",
            "--name",
            "Duty engineer",
            "--site",
            "Levee North",
            "--min-level",
            "1",
        ][..],
        &["all@levees.example.org"],
        &["chief@levees.example.org", "--min-level", "3"],
        &["south@levees.example.org", "--site", "Levee South"],
        &["digest@levees.example.org", "--digest-only"],
    ] {
        let mut a = vec!["recipient", "add"];
        a.extend_from_slice(args);
        assert!(cli(db, &a).contains("added"));
    }
    let listing = cli(db, &["recipient", "list"]);
    assert_eq!(listing.lines().count(), 5, "{listing}");
    assert!(
        listing
            .contains("duty@levees.example.org\tDuty engineer\tLevee North\tlevel >= 1\tper event")
    );
    assert!(listing.contains("digest@levees.example.org\t\tall sites\tlevel >= 0\tdaily digest"));
    let bad = cli_output(db, &["recipient", "add", "not an address"]);
    assert!(!bad.status.success());
    assert!(String::from_utf8_lossy(&bad.stderr).contains("not an email address"));
    let bad = cli_output(db, &["recipient", "add", "x@y.org", "--site", "Nowhere"]);
    assert!(String::from_utf8_lossy(&bad.stderr).contains("no site named \"Nowhere\""));
}

/// The main path: who gets what, the content, an SMTP outage (the email comes
/// once the server is back, once), a SIGKILL of `ohmline serve` while emails
/// wait (no loss, no duplicate), the hourly limit and the digest.
async fn smtp_outage_and_restart(engine: Engine) {
    let db = TestDb::new(engine).await;
    register_recipients(&db);
    let conn = db.connect().await;
    let mut smtp = SmtpSink::start().await;
    let config = db.path("ohmline.toml");
    std::fs::write(
        &config,
        format!(
            r#"
            [notify]
            public_base_url = "https://levees.example.org"
            from = "ohmline <alerts@levees.example.org>"
            poll_interval_s = 0.2
            lease_s = 20
            retry_initial_s = 0.3
            retry_max_s = 1
            [notify.smtp]
            host = "127.0.0.1"
            port = {}
            security = "none"
            timeout_s = 5
            "#,
            smtp.port
        ),
    )
    .unwrap();

    // A: raised at level 2 → duty (North, ≥ 1) and all (≥ 0) by email, digest@
    // waits for the digest; chief (≥ 3) and south (other site) get nothing.
    let a = enqueue(&conn, &notice(17, AlertEvent::Raised, 2), &params()).await.unwrap();
    assert_eq!((a.queued.len(), a.deferred.len()), (2, 1));
    let server = Server::start_with(&db, Some(&config)).await;
    // The worker processes the latest digest slot at start (it was missed while
    // the service was down), so digest@ gets a digest listing A.
    let received = smtp.wait_for(3, Duration::from_secs(30)).await;
    assert!(
        received.iter().all(|m| m.from.contains("alerts@levees.example.org")),
        "envelope sender"
    );
    let got = parse_all(&received);
    assert_eq!(got.len(), 3);
    let rows = db::outbox::list(&conn, None).await.unwrap();
    for m in &got {
        let row =
            rows.iter().find(|r| r.header_message_id == m.message_id).expect("stored Message-ID");
        assert_eq!(row.to_address, m.to);
        if m.to == "digest@levees.example.org" {
            assert!(
                m.subject.starts_with("[ohmline] Daily digest \u{2014} 1 alert event "),
                "{}",
                m.subject
            );
            assert!(m.text.contains(RAISED) && m.text.contains(CAUTION));
            assert!(m.html.contains(CAUTION));
        } else {
            check_alert(m, RAISED);
        }
    }
    let to: HashSet<&str> = got.iter().map(|m| m.to.as_str()).collect();
    assert_eq!(
        to,
        HashSet::from([
            "duty@levees.example.org",
            "all@levees.example.org",
            "digest@levees.example.org"
        ])
    );

    // The client has its replies (rows marked sent) before the server goes
    // away: a stop between a message taken and its reply would be retried.
    wait_for_sent(&conn, 3).await;

    // B: escalated to level 3 while the SMTP server is down.
    smtp.stop().await;
    let b = enqueue(&conn, &notice(17, AlertEvent::Escalated, 3), &params()).await.unwrap();
    assert_eq!((b.queued.len(), b.deferred.len()), (3, 1), "duty, all, chief; digest@ waits");
    wait_for_attempts(&conn, &b.queued, 2).await;
    assert_eq!(smtp.received().len(), 3, "nothing delivered during the outage");
    smtp.restart().await;
    let got = parse_all(&smtp.wait_for(6, Duration::from_secs(30)).await);
    assert_eq!(got.len(), 6);
    for m in &got[3..] {
        check_alert(m, ESCALATED);
    }

    // C: resolved while the SMTP server is down, then the service is killed
    // (SIGKILL) with C waiting; both come back. duty@ and all@ have had 2 emails
    // this hour, the limit: C waits for their digests.
    wait_for_sent(&conn, 6).await;
    smtp.stop().await;
    let c = enqueue(&conn, &notice(17, AlertEvent::Resolved, 3), &params()).await.unwrap();
    assert_eq!((c.queued.len(), c.deferred.len()), (1, 3), "chief; duty, all and digest@ wait");
    wait_for_attempts(&conn, &c.queued, 1).await;
    server.kill();
    smtp.restart().await;
    let server = Server::start_with(&db, Some(&config)).await;
    // A claim cut by the kill is retried when its lease (20 s) expires.
    let got = parse_all(&smtp.wait_for(7, Duration::from_secs(45)).await);
    assert_eq!(got.len(), 7);
    for m in &got[6..] {
        assert_eq!(m.subject, RESOLVED);
        assert!(m.text.contains(CAUTION) && m.html.contains(CAUTION));
    }

    // The next digest slot, run as the worker would at its time of day.
    let now = Utc::now();
    let run = db::outbox::run_digest(&conn, now, now, "levees.example.org").await.unwrap().unwrap();
    assert_eq!((run.digests.len(), run.items), (3, 4), "all@, duty@: C; digest@: B and C");
    let got = parse_all(&smtp.wait_for(10, Duration::from_secs(30)).await);
    // Let several polls and retry windows pass: nothing more may arrive.
    tokio::time::sleep(Duration::from_secs(2)).await;
    let all = parse_all(&smtp.received());
    assert_eq!(all.len(), 10, "{:#?}", by_address(&all));
    let digest_all =
        got.iter().find(|m| m.to == "all@levees.example.org" && m.subject.contains("digest"));
    assert!(digest_all.expect("all@ digest").text.contains(RESOLVED));

    let expected: BTreeMap<String, Vec<String>> = [
        ("all@levees.example.org", vec![RAISED, ESCALATED, "digest"]),
        ("chief@levees.example.org", vec![ESCALATED, RESOLVED]),
        ("digest@levees.example.org", vec!["digest", "digest"]),
        ("duty@levees.example.org", vec![RAISED, ESCALATED, "digest"]),
    ]
    .into_iter()
    .map(|(k, v)| (k.to_string(), v.into_iter().map(String::from).collect()))
    .collect();
    let mut received = by_address(&all);
    for subjects in received.values_mut() {
        for s in subjects.iter_mut() {
            if s.starts_with("[ohmline] Daily digest") {
                *s = "digest".into();
            }
        }
    }
    assert_eq!(received, expected, "exactly the expected emails, each once");
    let ids: HashSet<&str> = all.iter().map(|m| m.message_id.as_str()).collect();
    assert_eq!(ids.len(), all.len(), "no Message-ID twice");
    let rows = db::outbox::list(&conn, None).await.unwrap();
    assert!(rows.iter().all(|r| r.status == "sent" || r.status == "digested"), "{rows:#?}");
    server.kill();
}
on_both_engines!(smtp_outage_and_restart);

fn smtp_config(db: &TestDb, port: u16) -> std::path::PathBuf {
    let path = db.path("smtp.toml");
    let toml = format!(
        "[notify]\nfrom = \"alerts@levees.example.org\"\npoll_interval_s = 0.2\n\
         retry_initial_s = 0.3\nretry_max_s = 1\n\
         [notify.smtp]\nhost = \"127.0.0.1\"\nport = {port}\nsecurity = \"none\"\n"
    );
    std::fs::write(&path, toml).unwrap();
    path
}

/// A permanent refusal (550: no such mailbox) marks the email failed with the
/// server's reply and is not retried; the other recipient still gets it.
async fn permanent_refusal_is_not_retried(engine: Engine) {
    let db = TestDb::new(engine).await;
    cli(&db, &["recipient", "add", "bounce@levees.example.org"]);
    cli(&db, &["recipient", "add", "duty@levees.example.org"]);
    let conn = db.connect().await;
    let smtp = SmtpSink::start().await;
    enqueue(&conn, &notice(9, AlertEvent::Raised, 2), &params()).await.unwrap();
    let server = Server::start_with(&db, Some(&smtp_config(&db, smtp.port))).await;
    let got = parse_all(&smtp.wait_for(1, Duration::from_secs(30)).await);
    let deadline = Instant::now() + Duration::from_secs(20);
    let failed = loop {
        let failed = db::outbox::list(&conn, Some("failed")).await.unwrap();
        if !failed.is_empty() || Instant::now() > deadline {
            break failed;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    };
    // Several retry windows (0.3 s, 0.6 s, …) pass: no second attempt.
    tokio::time::sleep(Duration::from_millis(1500)).await;
    let failed_now = db::outbox::list(&conn, Some("failed")).await.unwrap();
    assert_eq!(failed, failed_now, "a failed email stays as it is");
    assert_eq!(failed.len(), 1);
    assert_eq!(
        (failed[0].to_address.as_str(), failed[0].attempts),
        ("bounce@levees.example.org", 1)
    );
    assert!(failed[0].last_error.as_deref().unwrap_or("").contains("550"), "{:?}", failed[0]);
    assert_eq!(got.len(), 1);
    check_alert(&got[0], RAISED);
    assert_eq!(smtp.received().len(), 1);
    server.kill();
}
on_both_engines!(permanent_refusal_is_not_retried);

/// Without SMTP (the demo), every email is an `.eml` file in
/// `<data_dir>/outbox/` that parses as a MIME message.
async fn eml_files_without_smtp(engine: Engine) {
    let db = TestDb::new(engine).await;
    cli(&db, &["site", "add", "Levee North"]);
    cli(&db, &["recipient", "add", "duty@levees.example.org", "--name", "Duty <engineer>"]);
    cli(&db, &["recipient", "add", "weekly@levees.example.org", "--digest-only"]);
    let gone = cli(&db, &["recipient", "add", "gone@levees.example.org", "--site", "Levee North"]);
    let gone_id = gone.trim().rsplit("(id ").next().unwrap().trim_end_matches(')');
    let conn = db.connect().await;
    let r = enqueue(&conn, &notice(5, AlertEvent::Raised, 2), &params()).await.unwrap();
    assert_eq!((r.queued.len(), r.deferred.len()), (2, 1));
    let out = cli(&db, &["recipient", "remove", gone_id]);
    assert!(out.contains("1 undelivered email(s) cancelled"), "{out}");

    let server = Server::start(&db).await;
    let dir = db.dir.path().join("outbox");
    let deadline = Instant::now() + Duration::from_secs(30);
    let files = loop {
        let files: Vec<_> = std::fs::read_dir(&dir)
            .map(|d| d.filter_map(|e| e.ok()).map(|e| e.path()).collect())
            .unwrap_or_default();
        let eml: Vec<_> =
            files.into_iter().filter(|p| p.extension().is_some_and(|e| e == "eml")).collect();
        if eml.len() >= 2 || Instant::now() > deadline {
            break eml;
        }
        tokio::time::sleep(Duration::from_millis(100)).await;
    };
    tokio::time::sleep(Duration::from_millis(800)).await;
    let again = std::fs::read_dir(&dir).unwrap().count();
    assert_eq!((files.len(), again), (2, 2), "one file per email, nothing else: {files:?}");
    let mails: Vec<Mail> = files.iter().map(|p| parse(&std::fs::read(p).unwrap(), None)).collect();
    let alert = mails.iter().find(|m| m.to == "duty@levees.example.org").expect("duty's email");
    check_alert(alert, RAISED);
    let digest = mails.iter().find(|m| m.to == "weekly@levees.example.org").expect("the digest");
    assert!(digest.subject.starts_with("[ohmline] Daily digest"));
    assert!(digest.text.contains(CAUTION) && digest.attachments.is_empty());
    let raw = std::fs::read_to_string(
        files
            .iter()
            .find(|p| std::fs::read_to_string(p).unwrap().contains("duty@levees.example.org"))
            .unwrap(),
    )
    .unwrap();
    assert!(raw.contains("Content-Type: multipart/mixed"), "MIME structure");
    assert!(raw.contains("multipart/alternative"));
    let rows = db::outbox::list(&conn, None).await.unwrap();
    let statuses: BTreeMap<&str, usize> = rows.iter().fold(BTreeMap::new(), |mut m, r| {
        *m.entry(r.status.as_str()).or_default() += 1;
        m
    });
    assert_eq!(statuses, BTreeMap::from([("cancelled", 1), ("digested", 1), ("sent", 2)]));
    server.kill();
}
on_both_engines!(eml_files_without_smtp);

/// The outbox under crashes: `ohmline serve` is SIGKILLed while it delivers
/// alert emails to the loopback SMTP server, and restarted. First exactly in
/// the window between the SMTP server accepting a message and the outbox
/// marking it sent (the server holds its reply), then at seeded random moments
/// while messages arrive. Every queued email arrives; the one accepted before
/// the crash arrives again, with the same Message-ID (at-least-once delivery);
/// each kill repeats at most the one message then in flight, and nothing
/// arrives that was not queued.
async fn emails_survive_sigkill_during_delivery(engine: Engine) {
    use rand::{Rng, SeedableRng};

    use crate::support::SmtpPace;

    const ALERTS: i64 = 8;
    const RANDOM_KILLS: usize = 2;
    let db = TestDb::new(engine).await;
    for address in ["duty@levees.example.org", "all@levees.example.org", "chief@levees.example.org"]
    {
        cli(&db, &["recipient", "add", address]);
    }
    let conn = db.connect().await;
    let smtp = SmtpSink::start().await;
    let config = db.path("ohmline.toml");
    // A 2 s lease (4 × the 0.5 s SMTP timeout, the least allowed): a killed
    // process's claims are taken again 2 s later.
    std::fs::write(
        &config,
        format!(
            "[notify]\nfrom = \"alerts@levees.example.org\"\npoll_interval_s = 0.1\n\
             lease_s = 2\nretry_initial_s = 0.3\nretry_max_s = 1\n\
             [notify.smtp]\nhost = \"127.0.0.1\"\nport = {}\nsecurity = \"none\"\ntimeout_s = 0.5\n",
            smtp.port
        ),
    )
    .unwrap();
    let no_limit = EnqueueParams { max_per_hour: 0, ..params() };
    let mut queued = Vec::new();
    for k in 0..ALERTS {
        let r = enqueue(&conn, &notice(100 + k, AlertEvent::Raised, 2), &no_limit).await.unwrap();
        assert!(r.deferred.is_empty());
        queued.extend(r.queued);
    }
    assert_eq!(queued.len(), 3 * ALERTS as usize);
    let message_id = |id: i64, rows: &[db::outbox::OutboxRow]| {
        rows.iter().find(|r| r.id == id).expect("queued row").header_message_id.clone()
    };

    // 1. The reply to the first message is held 0.4 s (less than the SMTP
    // timeout); the kill lands while the message is accepted and not marked.
    smtp.set_pace(SmtpPace {
        before_accept: Duration::ZERO,
        before_reply: Duration::from_millis(400),
    });
    let server = Server::start_with(&db, Some(&config)).await;
    let first = smtp.wait_for(1, Duration::from_secs(30)).await;
    server.kill();
    assert_eq!(first.len(), 1, "one message accepted before the kill");
    let held = parse(&first[0].data, Some(&first[0].to)).message_id;
    let rows = db::outbox::list(&conn, None).await.unwrap();
    let held_row = rows.iter().find(|r| r.header_message_id == held).expect("an outbox row");
    assert_eq!(held_row.status, "pending", "accepted by SMTP, not marked sent: {held_row:?}");

    // 2. Slow acceptance (60 ms a message); kills at random moments while
    // messages arrive.
    smtp.set_pace(SmtpPace {
        before_accept: Duration::from_millis(60),
        before_reply: Duration::ZERO,
    });
    let mut server = Server::start_with(&db, Some(&config)).await;
    let mut rng = rand::rngs::StdRng::seed_from_u64(20_261_203);
    for _ in 0..RANDOM_KILLS {
        let before = smtp.received().len();
        let now = smtp.wait_for(before + 1, Duration::from_secs(30)).await.len();
        assert!(now > before, "delivery goes on after a restart");
        tokio::time::sleep(Duration::from_millis(rng.random_range(0..150))).await;
        server.kill();
        server = Server::start_with(&db, Some(&config)).await;
    }

    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        let rows = db::outbox::list(&conn, None).await.unwrap();
        if rows.iter().all(|r| r.status == "sent") {
            break;
        }
        assert!(Instant::now() < deadline, "not all sent: {rows:#?}");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    // Several polls and retry windows pass: nothing more arrives.
    tokio::time::sleep(Duration::from_millis(1500)).await;
    let rows = db::outbox::list(&conn, None).await.unwrap();
    let got = parse_all(&smtp.received());
    let mut copies: BTreeMap<String, Vec<&Mail>> = BTreeMap::new();
    for m in &got {
        copies.entry(m.message_id.clone()).or_default().push(m);
    }
    for &id in &queued {
        let mid = message_id(id, &rows);
        let row = rows.iter().find(|r| r.id == id).unwrap();
        let c = copies.get(&mid).unwrap_or_else(|| panic!("row {id} ({mid}) never arrived"));
        for m in c {
            assert_eq!((m.to.as_str(), m.subject.as_str()), (row.to_address.as_str(), RAISED));
            check_alert(m, RAISED);
        }
    }
    assert_eq!(copies.len(), queued.len(), "nothing arrived that was not queued");
    let kills = 1 + RANDOM_KILLS;
    let repeats: usize = copies.values().map(|c| c.len() - 1).sum();
    assert!(copies[&held].len() >= 2, "the message accepted before the crash is sent again");
    assert!(repeats <= kills, "{repeats} repeated messages after {kills} kills");
    eprintln!(
        "{engine:?}: {} emails queued, {} received over {kills} kills, {repeats} repeated (same Message-ID)",
        queued.len(),
        got.len()
    );
    server.kill();
}
on_both_engines!(emails_survive_sigkill_during_delivery);
