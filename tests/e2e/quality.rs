//! Quality control through the running service: faults are found and stored,
//! a persistently failing electrode goes out of service, raw readings stay
//! bit-identical — on SQLite and PostgreSQL.

use ohmline_server::db;
use serde_json::Value;

use crate::on_both_engines;
use crate::support::{Engine, Server, TestDb, TestLine, register_line};

async fn faults_are_found_and_stored(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(24, 1.0, 4).with_reciprocals();
    let token = register_line(&db, "Test reach", "crest-q", &tl);
    let server = Server::start(&db).await;
    let dead = 9; // electrode E10
    let mut ids = Vec::new();
    for k in 0..5 {
        // Epochs 0–1 clean; from epoch 2 electrode E10 has lost contact: readings
        // through it are garbage and its contact resistance is 60 kΩ.
        let body = tl.epoch_csv_with(
            &format!("2026-07-01T{:02}:00:00Z", k * 3),
            100.0,
            k as u64,
            |i, q, r| {
                if k >= 2 && q.uses(dead) {
                    (r * (0.2 + (i % 7) as f64), if q.a == dead { 60_000.0 } else { 900.0 })
                } else if k == 1 && i == 5 {
                    (r * 4.0, 900.0) // a spike
                } else {
                    (r, 900.0)
                }
            },
        );
        let (s, v) = server.post_epoch("crest-q", &token, "text/csv", "", body).await;
        assert_eq!(s, 201, "{v}");
        ids.push(v["epoch_id"].as_i64().unwrap());
    }
    for &id in &ids {
        server.wait_status(id, &token, "checked").await;
    }
    let (s, clean) = server.get_json(&format!("/api/v1/epochs/{}/quality", ids[0]), &token).await;
    assert_eq!(s, 200, "{clean}");
    // Clean data with 0.5 % noise: nothing dropped beyond the odd reciprocal pair.
    assert!(clean["dropped_share"].as_f64().unwrap() < 0.02, "{}", clean["dropped_by_rule"]);
    assert_eq!(clean["flagged_electrodes"], Value::Array(vec![]));

    let (_, faulty) = server.get_json(&format!("/api/v1/epochs/{}/quality", ids[2]), &token).await;
    assert_eq!(
        faulty["flagged_electrodes"],
        serde_json::json!(["E10"]),
        "{}",
        faulty["electrodes"]
    );
    let readings = faulty["readings"].as_array().unwrap();
    for r in readings {
        let uses = ["a", "b", "m", "n"].iter().any(|f| r[*f] == "E10");
        if uses {
            assert_eq!(r["kept"], false, "{r}");
            assert!(
                r["reasons"].as_str().unwrap().contains("E10"),
                "reasons name the electrode: {r}"
            );
        }
    }
    let e10 = &faulty["electrodes"][dead];
    assert_eq!(e10["label"], "E10");
    assert!(!e10["flags"].as_array().unwrap().is_empty(), "{e10}");

    // Flagged in epochs 2, 3, 4: out of service after the third, with history.
    let store = db.connect().await;
    let line = db::lines::by_name(&store, "crest-q").await.unwrap().unwrap();
    let electrodes = db::lines::electrodes(&store, line.id).await.unwrap();
    assert!(!electrodes[dead].in_service, "E10 is out of service after three flagged epochs");
    assert!(electrodes.iter().enumerate().all(|(i, e)| i == dead || e.in_service));
    let history = db::lines::service_history(&store, line.id).await.unwrap();
    let change =
        history.iter().find(|h| h.electrode_id == electrodes[dead].id && !h.in_service).unwrap();
    assert_eq!(change.actor, "system");
    assert!(change.reason.contains("3 consecutive"), "{}", change.reason);
    let events = db::quality::events(&store, line.id, 50).await.unwrap();
    assert!(
        events.iter().any(|e| e.kind == "electrode_out_of_service" && e.detail.contains("E10")),
        "{events:?}"
    );

    // The spike in epoch 1 comes with only one earlier epoch, too little history
    // for the temporal spike test, so its reciprocal (4× off) is what drops it.
    let (_, e1) = server.get_json(&format!("/api/v1/epochs/{}/quality", ids[1]), &token).await;
    let r5 = &e1["readings"][5];
    assert_eq!(r5["kept"], false, "{r5}");
    assert!(r5["rules"].as_array().unwrap().contains(&Value::from("reciprocal")), "{r5}");

    // Raw readings are bit-identical after quality control.
    let (_, raw) = server.get_json(&format!("/api/v1/epochs/{}/readings", ids[2]), &token).await;
    let (_, v) = server.get_json(&format!("/api/v1/epochs/{}", ids[2]), &token).await;
    let status = v["status"].as_str().unwrap();
    assert!(["checked", "inverted", "processed"].contains(&status), "{v}");
    let stored = db::epochs::readings(&store, ids[2]).await.unwrap();
    assert_eq!(raw["readings"].as_array().unwrap().len(), stored.len());
    let gz = db::raw_uploads::body_gz(&store, v["raw_upload_id"].as_i64().unwrap()).await.unwrap();
    let mut body = String::new();
    std::io::Read::read_to_string(&mut flate2::read::GzDecoder::new(&gz[..]), &mut body).unwrap();
    for (line, r) in body.lines().skip(2).zip(&stored) {
        let u: f64 = line.split(',').nth(5).unwrap().parse().unwrap();
        assert_eq!(r.voltage_mv.unwrap().to_bits(), u.to_bits());
        assert_eq!(r.resistance_ohm.to_bits(), (u / 100.0).to_bits());
    }
    store.close().await;
}
on_both_engines!(faults_are_found_and_stored);
