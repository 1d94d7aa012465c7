//! The admin planning page: the same survey planning as `ohmline plan`
//! ([`crate::survey`]) for a straight, flat line — sequence size and epoch
//! duration, the cumulative-sensitivity figure, the sequence CSV to upload, and
//! the detectability of a described target. Reading only (GET), admin role.

use askama::Template;
use axum::extract::Query;
use axum::http::StatusCode;
use axum::response::Response;
use base64::Engine as _;
use ohmline_core::geometry::Surface;
use ohmline_core::planning::{ArrayFamily, Meter, Target};
use serde::{Deserialize, Serialize};
use serde_json::Value;

use super::exports::download;
use super::forms::SignedIn;
use super::view::Chrome;
use super::{PageError, render_with};
use crate::auth::Role;
use crate::survey::{self, PlanRequest, SurveyError};

/// The planning form, as text so that a bad value is reported, not refused
/// by the extractor. Defaults are those of `ohmline plan`.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(default)]
pub struct PlanForm {
    run: String,
    electrodes: String,
    spacing: String,
    wenner: String,
    dipole_dipole: String,
    gradient: String,
    max_a: String,
    max_n: String,
    gradient_s: String,
    reciprocals: String,
    channels: String,
    seconds: String,
    noise_relative: String,
    noise_absolute: String,
    background: String,
    target_x: String,
    target_width: String,
    target_depth: String,
    target_height: String,
    target_change: String,
}

impl Default for PlanForm {
    fn default() -> Self {
        let s = |v: &str| v.to_string();
        PlanForm {
            run: String::new(),
            electrodes: s("48"),
            spacing: s("1"),
            // Unchecked boxes are absent from a submitted form, so absent means off;
            // the first, empty form shows them checked (see `initial`).
            wenner: String::new(),
            dipole_dipole: String::new(),
            gradient: String::new(),
            max_a: s("6"),
            max_n: s("6"),
            gradient_s: s("6"),
            reciprocals: String::new(),
            channels: s("8"),
            seconds: s("0.5"),
            noise_relative: s("2"),
            noise_absolute: s("0.001"),
            background: s("100"),
            target_x: String::new(),
            target_width: String::new(),
            target_depth: String::new(),
            target_height: String::new(),
            target_change: String::new(),
        }
    }
}

impl PlanForm {
    /// The form as first shown: every family checked.
    fn initial() -> Self {
        let on = || "on".to_string();
        PlanForm { wenner: on(), dipole_dipole: on(), gradient: on(), ..Default::default() }
    }
}

fn number<T: std::str::FromStr>(label: &str, v: &str) -> Result<T, SurveyError> {
    v.trim()
        .parse()
        .map_err(|_| SurveyError::Input(format!("{label}: {:?} is not a valid number", v.trim())))
}

impl PlanForm {
    /// The request the form describes; `with_target` false leaves the
    /// (slow) detectability check out.
    fn request(&self, with_target: bool) -> Result<PlanRequest, SurveyError> {
        let n: usize = number("Electrodes", &self.electrodes)?;
        let spacing: f64 = number("Spacing", &self.spacing)?;
        let line = survey::flat_line(n, spacing)?;
        let surface =
            Surface::through_line(&line, &[]).map_err(|e| SurveyError::Compute(e.to_string()))?;
        let max_a: usize = number("Largest a", &self.max_a)?;
        let max_n: usize = number("Largest n", &self.max_n)?;
        let s: usize = number("Gradient dipoles per current pair", &self.gradient_s)?;
        let mut families = Vec::new();
        if !self.wenner.is_empty() {
            families.push(ArrayFamily::Wenner { max_a });
        }
        if !self.dipole_dipole.is_empty() {
            families.push(ArrayFamily::DipoleDipole { max_a, max_n });
        }
        if !self.gradient.is_empty() {
            families.push(ArrayFamily::Gradient { max_a, s });
        }
        let fields = [
            ("Target chainage", &self.target_x),
            ("Target width", &self.target_width),
            ("Target top depth", &self.target_depth),
            ("Target height", &self.target_height),
            ("Target change", &self.target_change),
        ];
        let given = fields.iter().filter(|(_, v)| !v.trim().is_empty()).count();
        let target = match given {
            0 => None,
            5 => {
                let v = fields
                    .iter()
                    .map(|(l, v)| number::<f64>(l, v))
                    .collect::<Result<Vec<f64>, _>>()?;
                if v.iter().any(|x| !x.is_finite()) {
                    return Err(SurveyError::Input("target values must be finite".into()));
                }
                Some(Target { x: v[0], width: v[1], depth: v[2], height: v[3], change_pct: v[4] })
            }
            _ => {
                let missing: Vec<&str> =
                    fields.iter().filter(|(_, v)| v.trim().is_empty()).map(|(l, _)| *l).collect();
                return Err(SurveyError::Input(format!(
                    "give all five target values or none; missing: {}",
                    missing.join(", ")
                )));
            }
        };
        Ok(PlanRequest {
            line,
            surface,
            families,
            reciprocals: !self.reciprocals.is_empty(),
            meter: Meter {
                channels: number("Channels", &self.channels)?,
                seconds_per_measurement: number("Time per injection", &self.seconds)?,
            },
            noise_relative_pct: number("Relative noise", &self.noise_relative)?,
            noise_absolute_ohm: number("Absolute noise", &self.noise_absolute)?,
            background_ohm_m: number("Background resistivity", &self.background)?,
            seed: 1,
            target: if with_target { target } else { None },
        })
    }
}

struct FamilyRow {
    name: String,
    limits: String,
    generated: String,
    expected: String,
    kept: String,
}

struct Detect {
    detected: bool,
    max_signal: String,
    above_noise: String,
    recovered: String,
    bound: String,
    centroid: String,
}

struct Outcome {
    families: Vec<FamilyRow>,
    quadrupoles: String,
    current_pairs: String,
    injections: String,
    duration: String,
    depths: String,
    line_length: String,
    png_data_uri: String,
    csv_href: String,
    detect: Option<Detect>,
}

#[derive(Template)]
#[template(path = "admin_plan.html")]
struct PlanPage {
    chrome: Chrome,
    form: PlanForm,
    error: String,
    outcome: Option<Outcome>,
}

fn f(v: &Value, digits: usize) -> String {
    v.as_f64().map(|x| format!("{x:.digits$}")).unwrap_or_else(|| "—".into())
}

fn outcome_view(form: &PlanForm, o: &survey::PlanOutcome) -> Outcome {
    let s = &o.summary;
    let families = s["arrays"]
        .as_array()
        .into_iter()
        .flatten()
        .map(|a| {
            let mut limits = vec![format!("a ≤ {}", a["max_a"])];
            if !a["max_n"].is_null() {
                limits.push(format!("n ≤ {}", a["max_n"]));
            }
            if !a["s"].is_null() {
                limits.push(format!("s = {}", a["s"]));
            }
            FamilyRow {
                name: a["family"].as_str().unwrap_or_default().to_string(),
                limits: limits.join(", "),
                generated: a["generated"].to_string(),
                expected: a["expected_count"].to_string(),
                kept: a["kept"].to_string(),
            }
        })
        .collect();
    let secs = s["epoch_duration_s"].as_f64().unwrap_or(0.0);
    let d = &s["median_depth_of_investigation_m"];
    let t = &s["detectability"];
    let detect = (!t.is_null()).then(|| Detect {
        detected: t["detected"] == true,
        max_signal: f(&t["max_signal_pct"], 2),
        above_noise: format!("{} of {}", t["quadrupoles_above_noise"], t["quadrupoles"]),
        recovered: f(&t["recovered_change_pct"], 1),
        bound: f(&t["no_change_noise_bound_pct"], 1),
        centroid: t["centroid_offset_m"]
            .as_f64()
            .map(|o| format!("{o:.1} m from the target"))
            .unwrap_or_else(|| "none found".into()),
    });
    let mut q = form.clone();
    q.run = "1".into();
    Outcome {
        families,
        quadrupoles: s["quadrupoles"].to_string(),
        current_pairs: s["current_pairs"].to_string(),
        injections: s["injections"].to_string(),
        duration: format!("{:.1} min ({secs:.0} s)", secs / 60.0),
        depths: format!("{}–{} m", f(&d["shallowest"], 2), f(&d["deepest"], 2)),
        line_length: f(&s["line_length_m"], 1),
        png_data_uri: format!(
            "data:image/png;base64,{}",
            base64::engine::general_purpose::STANDARD.encode(&o.sensitivity_png)
        ),
        csv_href: format!(
            "/admin/plan/sequence.csv?{}",
            serde_urlencoded::to_string(&q).unwrap_or_default()
        ),
        detect,
    }
}

/// `GET /admin/plan`: the form, and with `run=1` the plan it describes.
pub async fn plan(who: SignedIn, Query(form): Query<PlanForm>) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    let mut page =
        PlanPage { chrome: who.chrome("admin"), form, error: String::new(), outcome: None };
    if page.form.run.is_empty() {
        page.form = PlanForm::initial();
        return render_with(StatusCode::OK, &page);
    }
    let result = match page.form.request(true) {
        Ok(req) => tokio::task::spawn_blocking(move || survey::compute(&req))
            .await
            .map_err(|e| PageError::Task(format!("planning: {e}")))?,
        Err(e) => Err(e),
    };
    match result {
        Ok(o) => {
            tracing::info!(user = %who.user.email, quadrupoles = %o.summary["quadrupoles"], "survey planned");
            page.outcome = Some(outcome_view(&page.form, &o));
            render_with(StatusCode::OK, &page)
        }
        Err(e) => {
            page.error = format!("{e}.");
            render_with(StatusCode::BAD_REQUEST, &page)
        }
    }
}

/// `GET /admin/plan/sequence.csv`: the planned sequence, ready to upload.
pub async fn sequence_csv(
    who: SignedIn,
    Query(form): Query<PlanForm>,
) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    let req = form.request(false).map_err(|e| PageError::BadRequest(format!("{e}.")))?;
    let csv = survey::sequence_csv(&req).map_err(|e| PageError::BadRequest(format!("{e}.")))?;
    Ok(download("text/csv; charset=utf-8", "sequence.csv".into(), csv.into_bytes()))
}
