//! API keys: off by default; with a key file every request but the health checks needs a key,
//! and a job belongs to the key that created it.

mod service_support;

use std::sync::atomic::{AtomicU32, Ordering};

use axum::body::Body;
use axum::http::{Request, StatusCode};
use serde_json::json;
use service_support::{config, get, send, state_with, tea_inputs, Reply};
use zonetally::Config;

// reference: SHA-256 test vectors of FIPS 180-2 (published worked examples): "abc", and the
// 448-bit message "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq".
const ALPHA: &str = "abc";
const ALPHA_HASH: &str = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad";
const BETA: &str = "abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq";
const BETA_HASH: &str = "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1";

fn keyed(public_metrics: bool) -> Config {
    keyed_at(public_metrics, 0)
}

/// Each call writes its own key file: tests run side by side, and one test rewriting a file
/// another is reading would hand it an empty file.
fn keyed_at(public_metrics: bool, rate_limit: u32) -> Config {
    static NEXT: AtomicU32 = AtomicU32::new(0);
    let path = std::env::temp_dir().join(format!(
        "zonetally-keys-{}-{}",
        std::process::id(),
        NEXT.fetch_add(1, Ordering::Relaxed)
    ));
    std::fs::write(
        &path,
        format!("# test keys\n{ALPHA_HASH} alpha\n{BETA_HASH} beta\n"),
    )
    .unwrap();
    Config {
        api_keys: Some(path),
        public_metrics,
        rate_limit,
        ..config()
    }
}

async fn call(router: &axum::Router, method: &str, path: &str, key: Option<&str>) -> Reply {
    let mut req = Request::builder().method(method).uri(path);
    if let Some(k) = key {
        req = req.header("authorization", format!("Bearer {k}"));
    }
    let body = if method == "POST" {
        req = req
            .header("content-type", "application/json")
            .header("prefer", "respond-async");
        Body::from(serde_json::to_vec(&json!({"inputs": tea_inputs()})).unwrap())
    } else {
        Body::empty()
    };
    send(router, req.body(body).unwrap()).await
}

#[tokio::test]
async fn without_a_key_file_nothing_changes() {
    let (_, router) = state_with(config());
    let r = call(&router, "POST", "/processes/zone-counts/execution", None).await;
    assert_eq!(r.status, StatusCode::CREATED);
}

#[tokio::test]
async fn requests_need_a_known_key_and_jobs_stay_with_their_key() {
    let (_, router) = state_with(keyed(false));
    for path in ["/healthz", "/readyz"] {
        assert_eq!(get(&router, path).await.status, StatusCode::OK, "{path}");
    }
    let none = call(&router, "GET", "/jobs", None).await;
    assert_eq!(none.status, StatusCode::UNAUTHORIZED);
    assert_eq!(none.json()["type"], "/problems/unauthorized");
    assert!(none
        .header("www-authenticate")
        .unwrap()
        .starts_with("Bearer"));
    let wrong = call(&router, "GET", "/jobs", Some(ALPHA_HASH)).await;
    assert_eq!(wrong.status, StatusCode::UNAUTHORIZED);
    assert_eq!(
        call(&router, "GET", "/metrics", None).await.status,
        StatusCode::UNAUTHORIZED
    );

    let made = call(
        &router,
        "POST",
        "/processes/zone-counts/execution",
        Some(ALPHA),
    )
    .await;
    assert_eq!(made.status, StatusCode::CREATED, "{:?}", made.body);
    let location = made.header("location").unwrap();
    for path in [location.clone(), format!("{location}/results")] {
        let other = call(&router, "GET", &path, Some(BETA)).await;
        assert_eq!(other.status, StatusCode::NOT_FOUND, "{path}");
    }
    assert_eq!(
        call(&router, "DELETE", &location, Some(BETA)).await.status,
        StatusCode::NOT_FOUND
    );
    let listed = call(&router, "GET", "/jobs", Some(BETA)).await.json();
    assert_eq!(listed["jobs"].as_array().unwrap().len(), 0);
    let theirs_own = call(&router, "GET", "/jobs", Some(ALPHA)).await.json();
    assert_eq!(theirs_own["jobs"].as_array().unwrap().len(), 1);
    let own = call(&router, "GET", &location, Some(ALPHA)).await;
    assert_eq!(own.status, StatusCode::OK);
    let deleted = call(&router, "DELETE", &location, Some(ALPHA)).await;
    assert_eq!(deleted.status, StatusCode::OK);
}

#[tokio::test]
async fn metrics_can_stay_public() {
    let (_, router) = state_with(keyed(true));
    assert_eq!(get(&router, "/metrics").await.status, StatusCode::OK);
    assert_eq!(get(&router, "/jobs").await.status, StatusCode::UNAUTHORIZED);
}

#[tokio::test]
async fn a_key_file_holding_a_plain_key_is_refused_at_start() {
    let path = std::env::temp_dir().join(format!("zonetally-plain-keys-{}", std::process::id()));
    std::fs::write(&path, "my-secret-key\n").unwrap();
    let e = zonetally::AppState::new(Config {
        api_keys: Some(path),
        ..config()
    })
    .err()
    .unwrap();
    assert!(e.contains("line 1") && e.contains("SHA-256"), "{e}");
}

#[tokio::test]
async fn each_key_is_held_to_its_rate() {
    let (_, router) = state_with(keyed_at(false, 1));
    // A burst of one, then refused until the bucket refills a second later.
    assert_eq!(
        call(&router, "GET", "/jobs", Some(ALPHA)).await.status,
        StatusCode::OK
    );
    let refused = call(&router, "GET", "/jobs", Some(ALPHA)).await;
    assert_eq!(refused.status, StatusCode::TOO_MANY_REQUESTS);
    assert_eq!(refused.json()["type"], "/problems/rate-limited");
    assert!(refused.header("retry-after").is_some());
    // Another key has its own rate; health checks count against none.
    assert_eq!(
        call(&router, "GET", "/jobs", Some(BETA)).await.status,
        StatusCode::OK
    );
    assert_eq!(get(&router, "/healthz").await.status, StatusCode::OK);
}

#[tokio::test]
async fn rasters_stay_with_the_key_that_posted_them() {
    let (_, router) = state_with(keyed(false));
    let raster = serde_json::to_vec(&tea_inputs()["raster"]).unwrap();
    let post = |key: &'static str| {
        Request::post("/rasters")
            .header("content-type", "application/json")
            .header("authorization", format!("Bearer {key}"))
            .body(Body::from(raster.clone()))
            .unwrap()
    };
    let posted = send(&router, post(ALPHA)).await;
    assert_eq!(posted.status, StatusCode::CREATED);
    let reference = posted.json()["ref"].as_str().unwrap().to_string();
    let path = format!("/rasters/{reference}");
    assert_eq!(
        call(&router, "GET", &path, Some(ALPHA)).await.status,
        StatusCode::OK
    );
    assert_eq!(
        call(&router, "GET", &path, Some(BETA)).await.status,
        StatusCode::NOT_FOUND
    );
    let execute = |key: &'static str| {
        let mut inputs = tea_inputs();
        inputs["raster"] = json!({"ref": reference});
        Request::post("/processes/zone-counts/execution")
            .header("content-type", "application/json")
            .header("authorization", format!("Bearer {key}"))
            .body(Body::from(
                serde_json::to_vec(&json!({"inputs": inputs})).unwrap(),
            ))
            .unwrap()
    };
    assert_eq!(send(&router, execute(ALPHA)).await.status, StatusCode::OK);
    let other = send(&router, execute(BETA)).await;
    assert_eq!(other.status, StatusCode::BAD_REQUEST);
    assert_eq!(other.json()["pointer"], "/inputs/raster/ref");
    // The same raster posted by the other key is its own.
    assert_eq!(send(&router, post(BETA)).await.status, StatusCode::CREATED);
    assert_eq!(send(&router, execute(BETA)).await.status, StatusCode::OK);
}

#[tokio::test]
async fn the_openapi_document_says_which_routes_take_a_key_and_what_they_answer() {
    let spec: serde_json::Value = serde_json::from_str(zonetally::api::openapi_json()).unwrap();
    assert_eq!(
        spec["components"]["securitySchemes"]["api_key"]["scheme"],
        "bearer"
    );
    let (_, router) = state_with(keyed(false));
    let mut guarded = 0;
    for (path, item) in spec["paths"].as_object().unwrap() {
        for (method, op) in item.as_object().unwrap() {
            let responses = op["responses"].as_object().unwrap();
            if path == "/healthz" || path == "/readyz" {
                assert!(op.get("security").is_none(), "{method} {path} needs no key");
                continue;
            }
            // The key is optional in the document because it is off by default.
            assert_eq!(
                op["security"],
                json!([{}, {"api_key": []}]),
                "{method} {path}"
            );
            for status in ["401", "429", "504"] {
                assert!(
                    responses.contains_key(status),
                    "{method} {path} lacks {status}"
                );
            }
            if method == "post" {
                for status in ["408", "413", "415", "503"] {
                    assert!(
                        responses.contains_key(status),
                        "{method} {path} lacks {status}"
                    );
                }
            }
            // What the running service answers without a key is what the document lists.
            let concrete = path
                .replace("{processId}", "zone-counts")
                .replace("{jobId}", "0")
                .replace("{ref}", "0");
            let r = call(&router, &method.to_uppercase(), &concrete, None).await;
            assert_eq!(r.status, StatusCode::UNAUTHORIZED, "{method} {path}");
            guarded += 1;
        }
    }
    assert!(guarded >= 15, "only {guarded} operations seen");
}
