//! Admin page of a line's alert rules (`/admin/lines/{line}/rules`): trigger
//! levels, persistence, hysteresis, lateral contrast, the noise-calibrated
//! level, the rate-of-change and rise rules, the seasonal envelope and the
//! data-quality rules of core's [`RuleSet`]. The form is checked field by
//! field (a number that does not parse names its field) and then by
//! [`RuleSet::validate`] (a rule out of range names its field too); nothing
//! invalid is stored. Stored rules apply from the next processed epoch; each
//! change is recorded with who made it, in `line_rules` and the audit trail.

use std::collections::HashMap;

use askama::Template;
use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::Response;
use ohmline_core::alerts::{
    AlertsError, LateralRule, NoiseRule, QualityRules, RateRule, RiseRule, RuleSet, SeasonalRule,
    StageRule, TriggerLevel,
};

use super::forms::{CsrfForm, SignedIn};
use super::view::{Chrome, fmt_time};
use super::{PageError, render_with};
use crate::app::AppState;
use crate::auth::Role;
use crate::db::{self, lines::Line};

/// Level rows the form offers (more when stored rules have more).
const FORM_LEVELS: usize = 5;

/// One trigger-level row of the form.
struct LevelInput {
    /// 1-based.
    n: usize,
    change: String,
    area: String,
    width: String,
}

/// The form's values as text (from stored rules or as submitted).
struct RulesForm {
    levels: Vec<LevelInput>,
    persistence: String,
    clear_change: String,
    clear_epochs: String,
    lateral_on: bool,
    band_thickness: String,
    wetting_change: String,
    extensive_share: String,
    min_band_cells: String,
    noise_on: bool,
    noise_k: String,
    rate_on: bool,
    rate_drop: String,
    rate_window: String,
    rate_level: String,
    rise_on: bool,
    rise_change: String,
    rise_clear: String,
    rise_area: String,
    rise_width: String,
    rise_level: String,
    seasonal_on: bool,
    seasonal_margin: String,
    stage_on: bool,
    stage_margin: String,
    silent_hours: String,
    max_drop_share: String,
    electrode_out: bool,
    quality_clear: String,
}

fn num(v: f64) -> String {
    format!("{v}")
}

impl RulesForm {
    /// The form showing `r`; switched-off optional rules show the defaults'
    /// values (or sensible ones) so switching them on needs no typing.
    fn of(r: &RuleSet) -> Self {
        let d = RuleSet::default();
        let lateral = r.lateral.or(d.lateral).expect("defaults have a lateral rule");
        let noise = r.noise.or(d.noise).expect("defaults have a noise rule");
        let seasonal = r.seasonal.or(d.seasonal).expect("defaults have a seasonal rule");
        let rate = r.rate.unwrap_or(RateRule { drop_pct_per_day: 2.0, window_days: 3.0, level: 1 });
        let rise = r.rise.unwrap_or(RiseRule {
            change_pct: 20.0,
            clear_change_pct: 10.0,
            min_area_m2: 1.0,
            min_width_spacings: 1.0,
            level: 1,
        });
        let mut levels: Vec<LevelInput> = r
            .levels
            .iter()
            .enumerate()
            .map(|(i, l)| LevelInput {
                n: i + 1,
                change: num(l.change_pct),
                area: num(l.min_area_m2),
                width: num(l.min_width_spacings),
            })
            .collect();
        while levels.len() < FORM_LEVELS {
            levels.push(LevelInput {
                n: levels.len() + 1,
                change: String::new(),
                area: String::new(),
                width: String::new(),
            });
        }
        RulesForm {
            levels,
            persistence: r.persistence_epochs.to_string(),
            clear_change: num(r.clear_change_pct),
            clear_epochs: r.clear_epochs.to_string(),
            lateral_on: r.lateral.is_some(),
            band_thickness: num(lateral.band_thickness_spacings),
            wetting_change: num(lateral.wetting_change_pct),
            extensive_share: num(lateral.extensive_share),
            min_band_cells: lateral.min_band_cells.to_string(),
            noise_on: r.noise.is_some(),
            noise_k: num(noise.k),
            rate_on: r.rate.is_some(),
            rate_drop: num(rate.drop_pct_per_day),
            rate_window: num(rate.window_days),
            rate_level: rate.level.to_string(),
            rise_on: r.rise.is_some(),
            rise_change: num(rise.change_pct),
            rise_clear: num(rise.clear_change_pct),
            rise_area: num(rise.min_area_m2),
            rise_width: num(rise.min_width_spacings),
            rise_level: rise.level.to_string(),
            seasonal_on: r.seasonal.is_some(),
            seasonal_margin: num(seasonal.margin_pct),
            stage_on: r.stage.is_some(),
            stage_margin: num(r.stage.map_or(0.5, |s| s.margin_m)),
            silent_hours: num(r.quality.silent_after_s as f64 / 3600.0),
            max_drop_share: num(r.quality.max_drop_share),
            electrode_out: r.quality.electrode_out_of_service,
            quality_clear: r.quality.clear_after.to_string(),
        }
    }

    /// The form as submitted (missing text fields are empty, missing
    /// checkboxes off).
    fn submitted(f: &HashMap<String, String>) -> Self {
        let t = |k: &str| f.get(k).map(|v| v.trim().to_string()).unwrap_or_default();
        let on = |k: &str| f.contains_key(k);
        let n_levels = (1..=9).filter(|n| f.contains_key(&format!("level{n}_change"))).count();
        RulesForm {
            levels: (1..=n_levels.max(FORM_LEVELS))
                .map(|n| LevelInput {
                    n,
                    change: t(&format!("level{n}_change")),
                    area: t(&format!("level{n}_area")),
                    width: t(&format!("level{n}_width")),
                })
                .collect(),
            persistence: t("persistence"),
            clear_change: t("clear_change"),
            clear_epochs: t("clear_epochs"),
            lateral_on: on("lateral_on"),
            band_thickness: t("band_thickness"),
            wetting_change: t("wetting_change"),
            extensive_share: t("extensive_share"),
            min_band_cells: t("min_band_cells"),
            noise_on: on("noise_on"),
            noise_k: t("noise_k"),
            rate_on: on("rate_on"),
            rate_drop: t("rate_drop"),
            rate_window: t("rate_window"),
            rate_level: t("rate_level"),
            rise_on: on("rise_on"),
            rise_change: t("rise_change"),
            rise_clear: t("rise_clear"),
            rise_area: t("rise_area"),
            rise_width: t("rise_width"),
            rise_level: t("rise_level"),
            seasonal_on: on("seasonal_on"),
            seasonal_margin: t("seasonal_margin"),
            stage_on: on("stage_on"),
            stage_margin: t("stage_margin"),
            silent_hours: t("silent_hours"),
            max_drop_share: t("max_drop_share"),
            electrode_out: on("electrode_out"),
            quality_clear: t("quality_clear"),
        }
    }

    /// The rule set the form describes; the error names the field.
    fn rules(&self) -> Result<RuleSet, String> {
        fn real(label: &str, v: &str) -> Result<f64, String> {
            v.parse::<f64>()
                .ok()
                .filter(|x| x.is_finite())
                .ok_or_else(|| format!("{label}: {v:?} is not a number."))
        }
        fn whole<T: std::str::FromStr>(label: &str, v: &str) -> Result<T, String> {
            v.parse::<T>().map_err(|_| format!("{label}: {v:?} is not a whole number ≥ 0."))
        }
        let mut levels = Vec::new();
        for l in &self.levels {
            if l.change.is_empty() && l.area.is_empty() && l.width.is_empty() {
                continue;
            }
            let n = levels.len() + 1;
            if n != l.n {
                return Err(format!(
                    "Level {}: levels must be filled from the top; level {n} is empty.",
                    l.n
                ));
            }
            levels.push(TriggerLevel {
                change_pct: real(&format!("Level {n} change"), &l.change)?,
                min_area_m2: real(&format!("Level {n} minimum area"), &l.area)?,
                min_width_spacings: real(&format!("Level {n} minimum width"), &l.width)?,
            });
        }
        let silent_h = real("Silent after", &self.silent_hours)?;
        let silent_after_s = (silent_h * 3600.0).round();
        if !(1.0..1e9).contains(&silent_after_s) {
            return Err(format!("Silent after: {silent_h} h must be more than 0 and finite."));
        }
        Ok(RuleSet {
            levels,
            persistence_epochs: whole("Persistence", &self.persistence)?,
            clear_change_pct: real("Clear threshold", &self.clear_change)?,
            clear_epochs: whole("Clear after", &self.clear_epochs)?,
            lateral: if self.lateral_on {
                Some(LateralRule {
                    band_thickness_spacings: real("Depth-band thickness", &self.band_thickness)?,
                    wetting_change_pct: real("Wetting change", &self.wetting_change)?,
                    extensive_share: real("Extensive share", &self.extensive_share)?,
                    min_band_cells: whole("Fewest cells per band", &self.min_band_cells)?,
                })
            } else {
                None
            },
            noise: if self.noise_on {
                Some(NoiseRule { k: real("Noise multiple k", &self.noise_k)? })
            } else {
                None
            },
            rate: if self.rate_on {
                Some(RateRule {
                    drop_pct_per_day: real("Rate of drop", &self.rate_drop)?,
                    window_days: real("Rate window", &self.rate_window)?,
                    level: whole("Rate level", &self.rate_level)?,
                })
            } else {
                None
            },
            rise: if self.rise_on {
                Some(RiseRule {
                    change_pct: real("Rise change", &self.rise_change)?,
                    clear_change_pct: real("Rise clear threshold", &self.rise_clear)?,
                    min_area_m2: real("Rise minimum area", &self.rise_area)?,
                    min_width_spacings: real("Rise minimum width", &self.rise_width)?,
                    level: whole("Rise level", &self.rise_level)?,
                })
            } else {
                None
            },
            seasonal: if self.seasonal_on {
                Some(SeasonalRule { margin_pct: real("Seasonal margin", &self.seasonal_margin)? })
            } else {
                None
            },
            stage: if self.stage_on {
                Some(StageRule { margin_m: real("Margin above the stage", &self.stage_margin)? })
            } else {
                None
            },
            quality: QualityRules {
                silent_after_s: silent_after_s as i64,
                max_drop_share: real("Most rejected readings", &self.max_drop_share)?,
                electrode_out_of_service: self.electrode_out,
                clear_after: whole("Quality clear after", &self.quality_clear)?,
            },
        })
    }
}

/// The form's label of a field of [`RuleSet`] (as [`AlertsError::InvalidRule`] names it).
fn label_of(field: &str) -> String {
    if let Some(rest) = field.strip_prefix("levels[") {
        let (i, what) = rest.split_once("].").unwrap_or((rest, ""));
        let n = i.parse::<usize>().map(|i| i + 1).unwrap_or(0);
        let what = match what {
            "change_pct" => "change",
            "min_area_m2" => "minimum area",
            "min_width_spacings" => "minimum width",
            w => w,
        };
        return format!("Level {n} {what}");
    }
    match field {
        "levels" => "Trigger levels",
        "persistence_epochs" => "Persistence",
        "clear_epochs" => "Clear after",
        "clear_change_pct" => "Clear threshold",
        "lateral.band_thickness_spacings" => "Depth-band thickness",
        "lateral.wetting_change_pct" => "Wetting change",
        "lateral.extensive_share" => "Extensive share",
        "lateral.min_band_cells" => "Fewest cells per band",
        "noise.k" => "Noise multiple k",
        "rate.drop_pct_per_day" => "Rate of drop",
        "rate.window_days" => "Rate window",
        "rate.level" => "Rate level",
        "rise.change_pct" => "Rise change",
        "rise.clear_change_pct" => "Rise clear threshold",
        "rise.min_area_m2" => "Rise minimum area",
        "rise.min_width_spacings" => "Rise minimum width",
        "rise.level" => "Rise level",
        "seasonal.margin_pct" => "Seasonal margin",
        "stage.margin_m" => "Margin above the stage",
        "quality.silent_after_s" => "Silent after",
        "quality.max_drop_share" => "Most rejected readings",
        "quality.clear_after" => "Quality clear after",
        other => other,
    }
    .to_string()
}

/// A refusal of [`RuleSet::validate`] in the form's words.
fn explain(e: &AlertsError) -> String {
    match e {
        AlertsError::InvalidRule { field, reason } => {
            format!("{} ({field}): {reason}.", label_of(field))
        }
        other => format!("{other}."),
    }
}

/// One sentence per rule, for the audit trail.
fn summary(r: &RuleSet) -> String {
    let levels: Vec<String> = r.levels.iter().map(|l| format!("{}", l.change_pct)).collect();
    let on = |b: bool| if b { "on" } else { "off" };
    format!(
        "levels {} %, persistence {}, clear at {} % after {}, lateral {}, noise {}, rate {}, rise {}, seasonal {}, river stage {}",
        levels.join("/"),
        r.persistence_epochs,
        r.clear_change_pct,
        r.clear_epochs,
        on(r.lateral.is_some()),
        r.noise.map(|n| format!("k = {}", n.k)).unwrap_or_else(|| "off".into()),
        on(r.rate.is_some()),
        on(r.rise.is_some()),
        on(r.seasonal.is_some()),
        r.stage.map(|s| format!("margin {} m", s.margin_m)).unwrap_or_else(|| "off".into()),
    )
}

#[derive(Template)]
#[template(path = "admin_rules.html")]
struct RulesPage {
    chrome: Chrome,
    name: String,
    site: String,
    /// "Default rules" or "Version n, changed by … at …".
    state: String,
    /// What the noise calibration of the line's baseline rests on.
    noise: String,
    form: RulesForm,
    notice: String,
    error: String,
}

async fn line_named(state: &AppState, name: &str) -> Result<Line, PageError> {
    db::lines::by_name(&state.db, name)
        .await?
        .ok_or_else(|| PageError::NotFound(format!("Line {name:?}")))
}

/// The state of the noise calibration of the line's active baseline, in words.
async fn noise_text(state: &AppState, line: &Line) -> Result<String, PageError> {
    let Some(b) = db::models::active_baseline(&state.db, line.id).await? else {
        return Ok("Noise calibration: the line has no baseline yet.".into());
    };
    let n_baseline = b.epochs()?.len();
    Ok(match db::rules::noise(&state.db, line.id, b.id).await? {
        Some(n) => {
            let mut sigma: Vec<f64> = n.sigma.iter().flatten().copied().collect();
            sigma.sort_by(f64::total_cmp);
            let median = sigma.get(sigma.len() / 2).copied().unwrap_or(f64::NAN);
            format!(
                "Noise calibration: σ measured over {} of the baseline's {n_baseline} epochs for {} cells, median σ {median:.2} %.",
                n.epoch_ids.len(),
                sigma.len()
            )
        }
        None => format!(
            "Noise calibration: not measured yet (the baseline has {n_baseline} epochs; at least 5 with a change section are needed). Until then fixed thresholds apply."
        ),
    })
}

async fn page(
    state: &AppState,
    who: &SignedIn,
    line: Line,
    form: Option<RulesForm>,
    status: StatusCode,
    notice: &str,
    error: &str,
) -> Result<Response, PageError> {
    let site = db::sites::by_id(&state.db, line.site_id).await?.map(|s| s.name).unwrap_or_default();
    let stored = db::rules::get(&state.db, line.id).await?;
    let state_text = match &stored {
        Some(s) => format!(
            "Version {}, changed by {} at {}.",
            s.version,
            s.updated_by,
            fmt_time(s.updated_at)
        ),
        None => "This line uses the default rules.".into(),
    };
    let noise = noise_text(state, &line).await?;
    let form = form.unwrap_or_else(|| {
        RulesForm::of(stored.as_ref().map(|s| &s.rules).unwrap_or(&RuleSet::default()))
    });
    render_with(
        status,
        &RulesPage {
            chrome: who.chrome("admin"),
            name: line.name,
            site,
            state: state_text,
            noise,
            form,
            notice: notice.into(),
            error: error.into(),
        },
    )
}

/// `GET /admin/lines/{line}/rules`.
pub async fn rules(
    State(state): State<AppState>,
    who: SignedIn,
    Path(name): Path<String>,
) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    let line = line_named(&state, &name).await?;
    page(&state, &who, line, None, StatusCode::OK, "", "").await
}

/// `POST /admin/lines/{line}/rules`: stores the rules of the form, or the
/// defaults when the form's `defaults` button was pressed.
pub async fn save_rules(
    State(state): State<AppState>,
    Path(name): Path<String>,
    f: CsrfForm<HashMap<String, String>>,
) -> Result<Response, PageError> {
    let CsrfForm { who, form } = f;
    who.require(Role::Admin)?;
    let line = line_named(&state, &name).await?;
    let submitted = RulesForm::submitted(&form);
    let rules = if form.contains_key("defaults") {
        RuleSet::default()
    } else {
        match submitted.rules() {
            Ok(r) => r,
            Err(msg) => {
                return page(
                    &state,
                    &who,
                    line,
                    Some(submitted),
                    StatusCode::BAD_REQUEST,
                    "",
                    &msg,
                )
                .await;
            }
        }
    };
    if let Err(e) = rules.validate() {
        let msg = explain(&e);
        return page(&state, &who, line, Some(submitted), StatusCode::BAD_REQUEST, "", &msg).await;
    }
    let version = db::rules::set(&state.db, line.id, &rules, &who.user.email).await?;
    let detail = format!("version {version}: {}", summary(&rules));
    db::audit::record(&state.db, &who.user.email, "line.rules", &line.name, &detail).await?;
    let notice = format!(
        "Rules of line {} stored as version {version}; they apply from the next processed epoch.",
        line.name
    );
    page(&state, &who, line, None, StatusCode::OK, &notice, "").await
}

struct LineRulesView {
    name: String,
    site: String,
    state: String,
    levels: String,
}

#[derive(Template)]
#[template(path = "admin_rules_index.html")]
struct RulesIndexPage {
    chrome: Chrome,
    lines: Vec<LineRulesView>,
}

/// `GET /admin/rules`: every line with the state of its rules.
pub async fn rules_index(
    State(state): State<AppState>,
    who: SignedIn,
) -> Result<Response, PageError> {
    who.require(Role::Admin)?;
    let mut lines = Vec::new();
    for l in db::lines::list(&state.db, None).await? {
        let stored = db::rules::get(&state.db, l.id).await?;
        let (state_text, rules) = match stored {
            Some(s) => (
                format!("version {}, {} at {}", s.version, s.updated_by, fmt_time(s.updated_at)),
                s.rules,
            ),
            None => ("defaults".to_string(), RuleSet::default()),
        };
        let levels: Vec<String> =
            rules.levels.iter().map(|l| format!("{}", l.change_pct)).collect();
        lines.push(LineRulesView {
            name: l.name,
            site: l.site,
            state: state_text,
            levels: format!("{} % · persistence {}", levels.join(" / "), rules.persistence_epochs),
        });
    }
    render_with(StatusCode::OK, &RulesIndexPage { chrome: who.chrome("admin"), lines })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn fields(form: &RulesForm) -> HashMap<String, String> {
        let mut m = HashMap::new();
        for l in &form.levels {
            m.insert(format!("level{}_change", l.n), l.change.clone());
            m.insert(format!("level{}_area", l.n), l.area.clone());
            m.insert(format!("level{}_width", l.n), l.width.clone());
        }
        for (k, v) in [
            ("persistence", &form.persistence),
            ("clear_change", &form.clear_change),
            ("clear_epochs", &form.clear_epochs),
            ("band_thickness", &form.band_thickness),
            ("wetting_change", &form.wetting_change),
            ("extensive_share", &form.extensive_share),
            ("min_band_cells", &form.min_band_cells),
            ("noise_k", &form.noise_k),
            ("rate_drop", &form.rate_drop),
            ("rate_window", &form.rate_window),
            ("rate_level", &form.rate_level),
            ("rise_change", &form.rise_change),
            ("rise_clear", &form.rise_clear),
            ("rise_area", &form.rise_area),
            ("rise_width", &form.rise_width),
            ("rise_level", &form.rise_level),
            ("seasonal_margin", &form.seasonal_margin),
            ("stage_margin", &form.stage_margin),
            ("silent_hours", &form.silent_hours),
            ("max_drop_share", &form.max_drop_share),
            ("quality_clear", &form.quality_clear),
        ] {
            m.insert(k.to_string(), v.clone());
        }
        for (k, on) in [
            ("lateral_on", form.lateral_on),
            ("noise_on", form.noise_on),
            ("rate_on", form.rate_on),
            ("rise_on", form.rise_on),
            ("seasonal_on", form.seasonal_on),
            ("stage_on", form.stage_on),
            ("electrode_out", form.electrode_out),
        ] {
            if on {
                m.insert(k.to_string(), "on".into());
            }
        }
        m
    }

    #[test]
    fn the_form_of_a_rule_set_reads_back_as_the_same_rules() {
        let d = RuleSet::default();
        assert_eq!(RulesForm::submitted(&fields(&RulesForm::of(&d))).rules(), Ok(d.clone()));
        let r = RuleSet {
            noise: None,
            rate: Some(RateRule { drop_pct_per_day: 1.5, window_days: 2.0, level: 2 }),
            persistence_epochs: 5,
            stage: Some(StageRule { margin_m: 0.3 }),
            ..d
        };
        assert_eq!(RulesForm::submitted(&fields(&RulesForm::of(&r))).rules(), Ok(r));
    }

    #[test]
    fn bad_fields_are_named() {
        let mut f = fields(&RulesForm::of(&RuleSet::default()));
        f.insert("level2_change".into(), "minus ten".into());
        let err = RulesForm::submitted(&f).rules().unwrap_err();
        assert!(err.starts_with("Level 2 change"), "{err}");
        let mut f = fields(&RulesForm::of(&RuleSet::default()));
        f.insert("level1_change".into(), String::new());
        f.insert("level1_area".into(), String::new());
        f.insert("level1_width".into(), String::new());
        let err = RulesForm::submitted(&f).rules().unwrap_err();
        assert!(err.starts_with("Level 2:"), "{err}");
        let mut f = fields(&RulesForm::of(&RuleSet::default()));
        f.insert("level2_change".into(), "-5".into());
        let e = RulesForm::submitted(&f).rules().unwrap().validate().unwrap_err();
        assert!(
            explain(&e).starts_with("Level 2 change (levels[1].change_pct)"),
            "{}",
            explain(&e)
        );
    }
}
