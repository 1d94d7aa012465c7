//! The admin planning page over HTTP: the same survey planning as `ohmline
//! plan`, its sequence download, bad input named, and admins only.

use crate::support::{Engine, HttpSession, Server, TestDb, add_user};

/// Query of a 24-electrode line at 1 m, Wenner a ≤ 4 only, 8 channels, 0.5 s.
const WENNER_24: &str = "run=1&electrodes=24&spacing=1&wenner=on&max_a=4&max_n=6&gradient_s=6\
&channels=8&seconds=0.5&noise_relative=1&noise_absolute=0.001&background=100";

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn planning_page_counts_times_and_checks_a_target() {
    let db = TestDb::new(Engine::Sqlite).await;
    let admin_pw = add_user(&db, "admin@levee.test", "admin");
    let viewer_pw = add_user(&db, "viewer@levee.test", "viewer");
    let server = Server::start(&db).await;

    let mut viewer = HttpSession::new();
    assert_eq!(viewer.sign_in(&server, "viewer@levee.test", &viewer_pw).await, 303);
    let (s, _, _) = viewer.get(&server.url("/admin/plan")).await;
    assert_eq!(s, 403, "a viewer may not plan surveys");

    let mut admin = HttpSession::new();
    assert_eq!(admin.sign_in(&server, "admin@levee.test", &admin_pw).await, 303);
    let (s, _, page) = admin.get(&server.url("/admin/plan")).await;
    assert_eq!(s, 200);
    assert!(page.contains("id=\"plan-form\"") && !page.contains("id=\"plan-outcome\""));

    // Wenner α on N electrodes fits N − 3a times for each a (common
    // combinatorics): for N = 24, a = 1…4 that is 21 + 18 + 15 + 12 = 66. Each
    // has its own current pair and one potential dipole, so 66 injections of
    // 0.5 s: 33 s.
    let (s, _, page) = admin.get(&server.url(&format!("/admin/plan?{WENNER_24}"))).await;
    assert_eq!(s, 200, "{page}");
    assert!(page.contains("66 quadrupoles"), "{page}");
    assert!(page.contains("0.6 min (33 s)"), "{page}");
    assert!(page.contains("data:image/png;base64,iVBORw0KGgo"), "the sensitivity figure is a PNG");
    // Only the checked family was planned.
    assert!(!page.contains("<td>dipole-dipole</td>"), "{page}");

    let href = page
        .split("href=\"/admin/plan/sequence.csv?")
        .nth(1)
        .and_then(|r| r.split('"').next())
        .expect("a sequence.csv link")
        .replace("&amp;", "&")
        .replace("&#38;", "&");
    let (s, h, csv) = admin.get(&server.url(&format!("/admin/plan/sequence.csv?{href}"))).await;
    assert_eq!(s, 200);
    assert!(h["content-type"].to_str().unwrap().starts_with("text/csv"));
    let mut rows = csv.lines();
    assert_eq!(rows.next(), Some("a,b,m,n"));
    assert_eq!(rows.count(), 66);
    // Wenner a = 1 on the first electrodes: A = 1, B = 4, M = 2, N = 3.
    assert!(csv.lines().any(|l| l == "1,4,2,3"), "{csv}");

    // A target, described in full, gets a yes/no with the recovered change.
    let target = "&dipole_dipole=on&target_x=11.5&target_width=2&target_depth=1\
&target_height=2&target_change=-40";
    let (s, _, page) = admin.get(&server.url(&format!("/admin/plan?{WENNER_24}{target}"))).await;
    assert_eq!(s, 200, "{page}");
    assert!(page.contains("id=\"plan-detected\""), "{page}");
    assert!(page.contains("Recovered change in the target"), "{page}");

    // Bad input is named, and the form keeps what was typed.
    let (s, _, page) =
        admin.get(&server.url("/admin/plan?run=1&electrodes=many&spacing=1&wenner=on")).await;
    assert_eq!(s, 400);
    assert!(
        page.contains("Electrodes: &#34;many&#34; is not a valid number")
            || page.contains("Electrodes: &quot;many&quot; is not a valid number"),
        "{page}"
    );
    assert!(page.contains("value=\"many\""), "{page}");
    let (s, _, page) = admin
        .get(&server.url(&format!("/admin/plan?{WENNER_24}&target_x=3&target_change=-20")))
        .await;
    assert_eq!(s, 400);
    assert!(page.contains("missing: Target width, Target top depth, Target height"), "{page}");
    let (s, _, page) = admin
        .get(
            &server.url("/admin/plan?run=1&electrodes=24&spacing=1&max_a=4&channels=8&seconds=0.5"),
        )
        .await;
    assert_eq!(s, 400);
    assert!(page.contains("choose at least one array family"), "{page}");
    server.kill();
}
