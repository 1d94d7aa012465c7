//! Inversion, time-lapse, zones and alerts end to end: epochs computed with
//! the forward model (a homogeneous half-space, then a conductive block
//! appearing under the line) are uploaded to the real service, which inverts
//! them, forms a baseline, finds the zone, raises an alert after the
//! persistence epochs, writes the alert email, and lets an engineer
//! acknowledge it; on SQLite and PostgreSQL.
//!
//! Check values: for homogeneous ground every apparent resistivity equals the
//! ground's resistivity (analytic half-space solution, e.g. Telford, Geldart &
//! Sheriff, *Applied Geophysics*, 2nd ed. 1990, §8.3), so the baseline model
//! must come back flat at that value. The block's place and sign are known by
//! construction.

use std::time::{Duration, Instant};

use ohmline_core::alerts::CAUTION;
use ohmline_core::forward::{Forward, ForwardParams};
use ohmline_core::geometry::Surface;
use ohmline_core::mesh::{Mesh, MeshParams};
use serde_json::Value;

use crate::on_both_engines;
use crate::support::{
    Engine, RHO, Server, TestDb, TestLine, add_user, block_readings as readings, cli,
    readings_csv as csv, register_line, user_token, wait_processed,
};

async fn processing_season(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(32, 1.0, 6);
    let token = register_line(&db, "Test Levee", "crest-t", &tl);
    cli(&db, &["recipient", "add", "duty@levees.example.org", "--min-level", "1"]);
    let engineer = add_user(&db, "eng@levees.example.org", "engineer");
    let _ = engineer;
    let eng_token = user_token(&db, "eng@levees.example.org");
    add_user(&db, "view@levees.example.org", "viewer");
    let viewer_token = user_token(&db, "view@levees.example.org");
    let server = Server::start(&db).await;

    let surface = Surface::through_line(&tl.geometry, &[]).unwrap();
    let mesh = Mesh::new(&tl.geometry, &surface, &MeshParams::default()).unwrap();
    let fwd = Forward::new(mesh, &ForwardParams::default()).unwrap();

    // Three quiet epochs (the baseline), then four with the block.
    let mut ids = Vec::new();
    for k in 0..7u64 {
        let at = format!("2026-03-0{}T{:02}:00:00Z", 1 + k / 4, (k % 4) * 6);
        let body = csv(&tl, &at, &readings(&tl, &fwd, k >= 3, 100 + k));
        let (code, v) = server.post_epoch("crest-t", &token, "text/csv", "", body).await;
        assert_eq!(code, 201, "{v}");
        ids.push(v["epoch_id"].as_i64().unwrap());
    }
    wait_processed(&server, &ids, &token).await;

    // The baseline epochs come back as the homogeneous half-space.
    let (code, m) =
        server.get_json(&format!("/api/v1/epochs/{}/model?values=raw", ids[0]), &token).await;
    assert_eq!(code, 200, "{m}");
    let cells = m["cells"].as_array().unwrap();
    let inside: Vec<f64> = cells
        .iter()
        .filter(|c| c["in_mask"] == true)
        .map(|c| c["value"].as_f64().unwrap())
        .collect();
    assert!(inside.len() > 50, "{} cells in the mask", inside.len());
    let mean = inside.iter().sum::<f64>() / inside.len() as f64;
    assert!((mean / RHO - 1.0).abs() < 0.03, "mean in-mask ρ {mean} vs {RHO}");
    assert!(m["summary"]["chi2"].as_f64().unwrap() < 3.0, "{}", m["summary"]);

    // The last epoch's change: strongest drop inside the block.
    let (code, c) = server.get_json(&format!("/api/v1/epochs/{}/change", ids[6]), &token).await;
    assert_eq!(code, 200, "{c}");
    assert_eq!(c["mode"], "ratio");
    assert_eq!(c["modes"].as_array().unwrap().len(), 2, "both modes stored");
    let cells = c["cells"].as_array().unwrap();
    let (mut min, mut at) = (0.0f64, [0.0f64; 2]);
    for cell in cells.iter().filter(|c| c["in_mask"] == true) {
        let v = cell["value"].as_f64().unwrap();
        if v < min {
            min = v;
            let p = cell["polygon"].as_array().unwrap();
            let n = p.len() as f64;
            at = [
                p.iter().map(|q| q[0].as_f64().unwrap()).sum::<f64>() / n,
                p.iter().map(|q| q[1].as_f64().unwrap()).sum::<f64>() / n,
            ];
        }
    }
    assert!(min < -15.0, "strongest drop {min} %");
    assert!((12.0..=18.0).contains(&at[0]) && (6.0..=10.0).contains(&at[1]), "at {at:?}");
    let zones = c["zones"].as_array().unwrap();
    let z = zones.iter().find(|z| z["direction"] == "drop").expect("a drop zone");
    assert!(z["x_min"].as_f64().unwrap() < 16.0 && z["x_max"].as_f64().unwrap() > 14.0, "{z}");

    // Persistence 3: the alert is raised by the block's third epoch.
    let (code, list) = server.get_json("/api/v1/alerts?state=open&level=1", &token).await;
    assert_eq!(code, 200, "{list}");
    assert_eq!(list["caution"], CAUTION);
    let alerts = list["alerts"].as_array().unwrap();
    let zone_alert = alerts
        .iter()
        .find(|a| a["subject_kind"] == "zone")
        .unwrap_or_else(|| panic!("no zone alert: {list}"));
    let ch = zone_alert["chainage_m"].as_array().unwrap();
    let (c0, c1) = (ch[0].as_f64().unwrap(), ch[1].as_f64().unwrap());
    assert!(c0 < 16.0 && c1 > 14.0, "alert chainage {c0}–{c1} m misses the block 13–17 m");
    let id = zone_alert["id"].as_i64().unwrap();

    // The email is written to the outbox folder (no SMTP configured), with the caution.
    let outbox = db.dir.path().join("outbox");
    let deadline = Instant::now() + Duration::from_secs(30);
    let eml = loop {
        let found: Vec<String> = std::fs::read_dir(&outbox)
            .map(|d| {
                d.filter_map(|e| e.ok())
                    .filter(|e| e.path().extension().is_some_and(|x| x == "eml"))
                    .filter_map(|e| std::fs::read_to_string(e.path()).ok())
                    .collect()
            })
            .unwrap_or_default();
        if let Some(m) = found.into_iter().find(|m| m.contains("crest-t")) {
            break m;
        }
        assert!(Instant::now() < deadline, "no alert email in {}", outbox.display());
        tokio::time::sleep(Duration::from_millis(200)).await;
    };
    let unfolded = eml.replace("=\r\n", "").replace("=\n", "");
    assert!(unfolded.contains("image/png"), "figure attached");
    assert!(unfolded.contains("qualified engineer"), "caution in the email");

    // A viewer cannot acknowledge; an engineer can, and it is in the audit trail.
    let url = server.url(&format!("/api/v1/alerts/{id}/acknowledge"));
    let r = server
        .client
        .post(&url)
        .bearer_auth(&viewer_token)
        .json(&serde_json::json!({"note": "seen"}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 403);
    let r = server
        .client
        .post(&url)
        .bearer_auth(&eng_token)
        .json(&serde_json::json!({"note": "Inspection of the landside toe arranged."}))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    let v: Value = r.json().await.unwrap();
    assert_eq!(v["alert"]["state"], "acknowledged", "{v}");
    let trail = v["transitions"].as_array().unwrap();
    assert_eq!(trail.first().unwrap()["to_state"], "raised");
    let last = trail.last().unwrap();
    assert_eq!(last["to_state"], "acknowledged");
    assert_eq!(last["actor"], "eng@levees.example.org");
    assert_eq!(last["note"], "Inspection of the landside toe arranged.");

    // The CAP document of the alert parses and names the event.
    let r = server
        .client
        .get(server.url(&format!("/api/v1/alerts/{id}/cap")))
        .bearer_auth(&token)
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 200);
    let xml = r.text().await.unwrap();
    let doc = roxmltree::Document::parse(&xml).unwrap();
    assert_eq!(doc.root_element().tag_name().name(), "alert");

    // Reprocessing the line's history gives the same alert place again.
    let out = cli(&db, &["reprocess", "--line", "crest-t", "--no-wait"]);
    assert!(out.contains("7 epochs"), "{out}");
    wait_processed(&server, &ids, &token).await;
    let (_, list) = server.get_json("/api/v1/alerts?state=open&level=1", &token).await;
    let again = list["alerts"].as_array().unwrap();
    assert!(again.iter().any(|a| a["subject_kind"] == "zone" && a["id"] != id), "{list}");
    server.kill();
}
on_both_engines!(processing_season);
