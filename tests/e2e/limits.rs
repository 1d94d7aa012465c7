//! Limits over real HTTP: slow clients lose their connection (headers sent
//! byte by byte, an idle kept-alive connection, a body that never ends),
//! rate limits per meter token, per address and on sign-in answer 429 with
//! Retry-After, a full processing backlog refuses uploads until the workers
//! catch up, and an oversized form gets 413.

use std::io::{ErrorKind, Read, Write};
use std::net::TcpStream;
use std::time::{Duration, Instant};

use serde_json::Value;

use crate::on_both_engines;
use crate::support::{Engine, HttpSession, Server, TestDb, TestLine, add_user, cli, register_line};

fn config(db: &TestDb, toml: &str) -> std::path::PathBuf {
    let path = db.path("ohmline.toml");
    std::fs::write(&path, toml).unwrap();
    path
}

fn addr(server: &Server) -> String {
    server.base.trim_start_matches("http://").to_string()
}

/// Reads until the server closes the connection or `limit` passes; returns
/// what was read and whether it closed.
fn read_until_closed(s: &mut TcpStream, limit: Duration) -> (String, bool) {
    s.set_read_timeout(Some(Duration::from_millis(100))).unwrap();
    let start = Instant::now();
    let mut got = Vec::new();
    let mut buf = [0u8; 4096];
    while start.elapsed() < limit {
        match s.read(&mut buf) {
            Ok(0) => return (String::from_utf8_lossy(&got).into(), true),
            Ok(n) => got.extend_from_slice(&buf[..n]),
            Err(e) if matches!(e.kind(), ErrorKind::WouldBlock | ErrorKind::TimedOut) => {}
            Err(_) => return (String::from_utf8_lossy(&got).into(), true),
        }
    }
    (String::from_utf8_lossy(&got).into(), false)
}

/// Reads until a response's head has arrived (or the connection closed, or
/// `limit` passed); returns it and when it was complete.
fn read_response_head(s: &mut TcpStream, limit: Duration) -> (String, Instant) {
    s.set_read_timeout(Some(Duration::from_millis(50))).unwrap();
    let start = Instant::now();
    let mut got = Vec::new();
    let mut buf = [0u8; 4096];
    while start.elapsed() < limit {
        match s.read(&mut buf) {
            Ok(0) => break,
            Ok(n) => {
                got.extend_from_slice(&buf[..n]);
                if got.windows(4).any(|w| w == b"\r\n\r\n") {
                    break;
                }
            }
            Err(e) if matches!(e.kind(), ErrorKind::WouldBlock | ErrorKind::TimedOut) => {}
            Err(_) => break,
        }
    }
    (String::from_utf8_lossy(&got).into(), Instant::now())
}

fn error_code(v: &Value) -> &str {
    v["error"]["code"].as_str().unwrap_or_default()
}

/// A client that sends its headers one byte every 200 ms, one that connects
/// and says nothing, and one whose body never completes: the first two lose
/// the connection after the 1 s header timeout, the third gets 408 after the
/// 2 s request timeout; meanwhile other clients are served.
async fn slow_clients_cannot_hold_connections(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    let token = register_line(&db, "Test reach", "crest-t", &tl);
    let c = config(&db, "[limits]\nheader_read_timeout_s = 1\nrequest_timeout_s = 2\n");
    let server = Server::start_with(&db, Some(&c)).await;
    let address = addr(&server);

    let slow_headers = {
        let address = address.clone();
        tokio::task::spawn_blocking(move || {
            let mut s = TcpStream::connect(&address).unwrap();
            let request = b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\nUser-Agent: slow\r\nAccept: */*\r\n\r\n";
            let start = Instant::now();
            for (i, b) in request.iter().enumerate() {
                if s.write_all(&[*b]).is_err() {
                    return (i, start.elapsed(), String::new(), true);
                }
                std::thread::sleep(Duration::from_millis(200));
                s.set_nonblocking(true).unwrap();
                let mut probe = [0u8; 512];
                let closed = match s.read(&mut probe) {
                    Ok(0) => true,
                    Ok(n) => {
                        let text = String::from_utf8_lossy(&probe[..n]).to_string();
                        s.set_nonblocking(false).unwrap();
                        return (i + 1, start.elapsed(), text, true);
                    }
                    Err(e) => e.kind() != ErrorKind::WouldBlock,
                };
                s.set_nonblocking(false).unwrap();
                if closed {
                    return (i + 1, start.elapsed(), String::new(), true);
                }
            }
            let (text, closed) = read_until_closed(&mut s, Duration::from_secs(5));
            (request.len(), start.elapsed(), text, closed)
        })
    };
    let idle = {
        let address = address.clone();
        tokio::task::spawn_blocking(move || {
            let mut s = TcpStream::connect(&address).unwrap();
            let start = Instant::now();
            let (text, closed) = read_until_closed(&mut s, Duration::from_secs(10));
            (start.elapsed(), text, closed)
        })
    };
    let slow_body = {
        let address = address.clone();
        let token = token.clone();
        tokio::task::spawn_blocking(move || {
            let mut s = TcpStream::connect(&address).unwrap();
            let head = format!(
                "POST /api/v1/lines/crest-t/epochs HTTP/1.1\r\nHost: 127.0.0.1\r\nAuthorization: Bearer {token}\r\nContent-Type: text/csv\r\nContent-Length: 100000\r\n\r\n"
            );
            s.write_all(head.as_bytes()).unwrap();
            let start = Instant::now();
            s.write_all(b"# started_at: 2026-05-01T00:00:00Z\n").unwrap();
            let (text, at) = read_response_head(&mut s, Duration::from_secs(10));
            (at - start, text)
        })
    };
    // Others are served while the slow clients wait.
    for _ in 0..5 {
        let r = server.client.get(server.url("/healthz")).send().await.unwrap();
        assert_eq!(r.status(), 200);
        tokio::time::sleep(Duration::from_millis(100)).await;
    }

    let (sent, took, answer, closed) = slow_headers.await.unwrap();
    assert!(closed, "the slow client was cut off");
    assert!(sent < 40, "cut off after {sent} bytes of headers, {took:?}: {answer:?}");
    assert!(took < Duration::from_secs(4), "{took:?}");
    assert!(!answer.contains("200 OK"), "{answer}");

    let (took, answer, closed) = idle.await.unwrap();
    assert!(closed && took < Duration::from_secs(4), "idle connection closed after {took:?}");
    assert!(!answer.contains("200"), "{answer:?}");

    let (took, answer) = slow_body.await.unwrap();
    assert!(answer.starts_with("HTTP/1.1 408"), "{answer:?}");
    assert!(took >= Duration::from_millis(1900) && took < Duration::from_secs(6), "{took:?}");

    // A normal upload still works, and nothing half-written was stored.
    let (s, v) = server.get_json("/api/v1/lines/crest-t/epochs", &token).await;
    assert_eq!((s, v["epochs"].as_array().unwrap().len()), (200, 0), "{v}");
    let (s, v) = server
        .post_epoch(
            "crest-t",
            &token,
            "text/csv",
            "",
            tl.epoch_csv("2026-05-01T00:00:00Z", 80.0, 0),
        )
        .await;
    assert_eq!(s, 201, "{v}");
}
on_both_engines!(slow_clients_cannot_hold_connections);

/// Upload rates per meter token and per address, sign-in attempts per
/// address: a minute's allowance, then 429 naming the limit with Retry-After.
async fn rate_limits_answer_429_with_retry_after(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    let a = register_line(&db, "Test reach", "crest-a", &tl);
    let b = register_line(&db, "Test reach", "crest-b", &tl);
    let b2 = cli(&db, &["token", "issue", "--line", "crest-b"]).trim().to_string();
    let c = config(
        &db,
        "[limits]\nuploads_per_minute_per_token = 3\nuploads_per_minute_per_ip = 6\nsign_ins_per_minute_per_ip = 4\n",
    );
    let server = Server::start_with(&db, Some(&c)).await;
    let epoch = |k: usize| tl.epoch_csv(&format!("2026-05-0{}T00:00:00Z", k + 1), 80.0, k);
    let post = |token: &str, k: usize| {
        let url = server.url(&format!(
            "/api/v1/lines/{}/epochs",
            if token == a { "crest-a" } else { "crest-b" }
        ));
        server
            .client
            .post(url)
            .bearer_auth(token)
            .header("content-type", "text/csv")
            .body(epoch(k))
            .send()
    };
    for k in 0..3 {
        assert_eq!(post(&a, k).await.unwrap().status(), 201, "upload {k} of token A");
    }
    let r = post(&a, 3).await.unwrap();
    assert_eq!(r.status(), 429);
    let retry: u64 = r.headers()["retry-after"].to_str().unwrap().parse().unwrap();
    assert!((1..=20).contains(&retry), "one upload per 20 s: {retry}");
    let v: Value = r.json().await.unwrap();
    assert_eq!(error_code(&v), "rate_limited");
    let m = v["error"]["message"].as_str().unwrap();
    assert!(m.contains("3 uploads a minute") && m.contains("uploads_per_minute_per_token"), "{m}");
    // Another token from the same address: its own allowance, until the
    // address's 6 a minute are used up.
    for k in 0..3 {
        assert_eq!(post(&b, k).await.unwrap().status(), 201, "upload {k} of token B");
    }
    let r = post(&b2, 3).await.unwrap();
    assert_eq!(r.status(), 429);
    assert!(r.headers().contains_key("retry-after"));
    let v: Value = r.json().await.unwrap();
    assert!(v["error"]["message"].as_str().unwrap().contains("uploads_per_minute_per_ip"), "{v}");
    // The refused epochs were not stored.
    let token_a = a.clone();
    let (_, v) = server.get_json("/api/v1/lines/crest-a/epochs", &token_a).await;
    assert_eq!(v["epochs"].as_array().unwrap().len(), 3);

    // Sign-in attempts: 4 a minute per address, right or wrong.
    let pw = add_user(&db, "duty@levee.test", "engineer");
    let mut s = HttpSession::new();
    for i in 0..3 {
        assert_eq!(s.sign_in(&server, &format!("u{i}@levee.test"), "wrong").await, 401);
    }
    assert_eq!(s.sign_in(&server, "duty@levee.test", &pw).await, 303);
    let mut fresh = HttpSession::new();
    let (_, _, page) = fresh.get(&server.url("/sign-in")).await;
    let csrf = crate::support::hidden_input(&page, "csrf").unwrap();
    let (st, h, page) = fresh
        .post(
            &server.url("/sign-in"),
            &[("csrf", &csrf), ("email", "duty@levee.test"), ("password", &pw)],
        )
        .await;
    assert_eq!(st, 429, "{page}");
    assert!(h.contains_key("retry-after"));
    assert!(page.contains("at most 4 a minute"), "{page}");
}
on_both_engines!(rate_limits_answer_429_with_retry_after);

/// With at most one epoch waiting for processing, a second upload right after
/// the first is refused (429, Retry-After from the configuration) and stored
/// nowhere; once the workers have processed the first, uploads are accepted.
/// A form over its limit gets 413.
async fn a_full_backlog_pushes_back(engine: Engine) {
    let db = TestDb::new(engine).await;
    let tl = TestLine::new(12, 1.0, 2);
    let token = register_line(&db, "Test reach", "crest-t", &tl);
    let c = config(&db, "[limits]\nmax_backlog_epochs = 1\nbacklog_retry_after_s = 7\n");
    let server = Server::start_with(&db, Some(&c)).await;
    let epoch = |k: usize| tl.epoch_csv(&format!("2026-05-0{}T00:00:00Z", k + 1), 80.0, k);
    let (s, v) = server.post_epoch("crest-t", &token, "text/csv", "", epoch(0)).await;
    assert_eq!(s, 201, "{v}");
    let first = v["epoch_id"].as_i64().unwrap();
    let r = server
        .client
        .post(server.url("/api/v1/lines/crest-t/epochs"))
        .bearer_auth(&token)
        .header("content-type", "text/csv")
        .body(epoch(1))
        .send()
        .await
        .unwrap();
    assert_eq!(r.status(), 429);
    assert_eq!(r.headers()["retry-after"], "7");
    let v: Value = r.json().await.unwrap();
    assert_eq!(error_code(&v), "backlog_full", "{v}");
    assert!(v["error"]["message"].as_str().unwrap().contains("limits.max_backlog_epochs = 1"));
    server.wait_status(first, &token, "processed").await;
    // The remembered count is refreshed at most once a second.
    tokio::time::sleep(Duration::from_millis(1100)).await;
    let (s, v) = server.post_epoch("crest-t", &token, "text/csv", "", epoch(1)).await;
    assert_eq!(s, 201, "accepted once the backlog is processed: {v}");
    let (_, v) = server.get_json("/api/v1/lines/crest-t/epochs", &token).await;
    assert_eq!(v["epochs"].as_array().unwrap().len(), 2);

    // A form body over 64 KiB.
    let pw = add_user(&db, "duty@levee.test", "engineer");
    let mut s = HttpSession::new();
    assert_eq!(s.sign_in(&server, "duty@levee.test", &pw).await, 303);
    let csrf = s.csrf(&server).await;
    let big = "x".repeat(70_000);
    let (st, _, page) =
        s.post(&server.url("/account/password"), &[("csrf", &csrf), ("current", &big)]).await;
    assert_eq!(st, 413, "{page}");
    assert!(page.contains("at most 65536 bytes"), "{page}");
}
on_both_engines!(a_full_backlog_pushes_back);
