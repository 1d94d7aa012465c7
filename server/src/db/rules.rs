//! Per-line alert rules (`line_rules`, one JSON document per line with a
//! version and who changed it) and the cached noise calibration of a line's
//! baseline (`line_noise`). Core's rule types carry no serialisation; the
//! DTOs here mirror them field for field and convert both ways.

use chrono::{DateTime, Utc};
use ohmline_core::alerts::{
    LateralRule, NoiseRule, QualityRules, RateRule, RiseRule, RuleSet, SeasonalRule, StageRule,
    TriggerLevel,
};
use serde::{Deserialize, Serialize};

use super::{Db, DbError, DbResult, in_tx, now, on_pool};

/// Stored and API form of [`TriggerLevel`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LevelDto {
    /// Change at or below which a cell qualifies, % (< 0).
    pub change_pct: f64,
    /// Smallest qualifying cluster, m².
    pub min_area_m2: f64,
    /// Smallest horizontal extent, electrode spacings.
    pub min_width_spacings: f64,
}

/// Stored and API form of [`LateralRule`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LateralDto {
    /// Depth-band thickness, electrode spacings.
    pub band_thickness_spacings: f64,
    /// Change counting towards a line-wide wetting, %.
    pub wetting_change_pct: f64,
    /// Share of a band's area that must reach it (0–1].
    pub extensive_share: f64,
    /// Fewest in-mask cells for a band background.
    pub min_band_cells: usize,
}

/// Stored and API form of [`NoiseRule`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NoiseDto {
    /// Multiple of the cell's σ.
    pub k: f64,
}

/// Stored and API form of [`RateRule`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RateDto {
    /// Drop rate that qualifies, % per day.
    pub drop_pct_per_day: f64,
    /// Window the slope is fitted over, days.
    pub window_days: f64,
    /// Level it raises (1-based).
    pub level: u8,
}

/// Stored and API form of [`RiseRule`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RiseDto {
    /// Rise at or above which a cell qualifies, %.
    pub change_pct: f64,
    /// Gentler threshold a rise zone is cut at, %.
    pub clear_change_pct: f64,
    /// Smallest qualifying cluster, m².
    pub min_area_m2: f64,
    /// Smallest horizontal extent, electrode spacings.
    pub min_width_spacings: f64,
    /// Level it raises (1-based).
    pub level: u8,
}

/// Stored and API form of [`SeasonalRule`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SeasonalDto {
    /// Margin beyond the seasonal range, %.
    pub margin_pct: f64,
}

/// Stored and API form of [`StageRule`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StageDto {
    /// Height above the river stage up to which a cell counts as below it, m.
    pub margin_m: f64,
}

/// Stored and API form of [`QualityRules`].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct QualityDto {
    /// A line without an epoch for this long is silent, s.
    pub silent_after_s: i64,
    /// Largest share of rejected readings before raising, 0–1.
    pub max_drop_share: f64,
    /// Raise when an electrode is out of service.
    pub electrode_out_of_service: bool,
    /// Observations without the event before a quality alert resolves.
    pub clear_after: u32,
}

/// Stored and API form of a [`RuleSet`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RulesDto {
    /// Trigger levels, gentlest first.
    pub levels: Vec<LevelDto>,
    /// Consecutive epochs before raising or escalating.
    pub persistence_epochs: u32,
    /// Gentler threshold zones are cut at and must come back above to clear, %.
    pub clear_change_pct: f64,
    /// Consecutive clear epochs before resolving.
    pub clear_epochs: u32,
    /// Lateral-contrast rule.
    pub lateral: Option<LateralDto>,
    /// Noise-calibrated level.
    pub noise: Option<NoiseDto>,
    /// Rate-of-change rule.
    pub rate: Option<RateDto>,
    /// Rule for resistivity rises.
    pub rise: Option<RiseDto>,
    /// Seasonal-envelope rule.
    pub seasonal: Option<SeasonalDto>,
    /// River-stage rule (absent in rules stored before it existed: off).
    #[serde(default)]
    pub stage: Option<StageDto>,
    /// Data-quality rules.
    pub quality: QualityDto,
}

impl From<&RuleSet> for RulesDto {
    fn from(r: &RuleSet) -> Self {
        RulesDto {
            levels: r
                .levels
                .iter()
                .map(|l| LevelDto {
                    change_pct: l.change_pct,
                    min_area_m2: l.min_area_m2,
                    min_width_spacings: l.min_width_spacings,
                })
                .collect(),
            persistence_epochs: r.persistence_epochs,
            clear_change_pct: r.clear_change_pct,
            clear_epochs: r.clear_epochs,
            lateral: r.lateral.map(|l| LateralDto {
                band_thickness_spacings: l.band_thickness_spacings,
                wetting_change_pct: l.wetting_change_pct,
                extensive_share: l.extensive_share,
                min_band_cells: l.min_band_cells,
            }),
            noise: r.noise.map(|n| NoiseDto { k: n.k }),
            rate: r.rate.map(|x| RateDto {
                drop_pct_per_day: x.drop_pct_per_day,
                window_days: x.window_days,
                level: x.level,
            }),
            rise: r.rise.map(|x| RiseDto {
                change_pct: x.change_pct,
                clear_change_pct: x.clear_change_pct,
                min_area_m2: x.min_area_m2,
                min_width_spacings: x.min_width_spacings,
                level: x.level,
            }),
            seasonal: r.seasonal.map(|s| SeasonalDto { margin_pct: s.margin_pct }),
            stage: r.stage.map(|s| StageDto { margin_m: s.margin_m }),
            quality: QualityDto {
                silent_after_s: r.quality.silent_after_s,
                max_drop_share: r.quality.max_drop_share,
                electrode_out_of_service: r.quality.electrode_out_of_service,
                clear_after: r.quality.clear_after,
            },
        }
    }
}

impl From<&RulesDto> for RuleSet {
    fn from(d: &RulesDto) -> Self {
        RuleSet {
            levels: d
                .levels
                .iter()
                .map(|l| TriggerLevel {
                    change_pct: l.change_pct,
                    min_area_m2: l.min_area_m2,
                    min_width_spacings: l.min_width_spacings,
                })
                .collect(),
            persistence_epochs: d.persistence_epochs,
            clear_change_pct: d.clear_change_pct,
            clear_epochs: d.clear_epochs,
            lateral: d.lateral.map(|l| LateralRule {
                band_thickness_spacings: l.band_thickness_spacings,
                wetting_change_pct: l.wetting_change_pct,
                extensive_share: l.extensive_share,
                min_band_cells: l.min_band_cells,
            }),
            noise: d.noise.map(|n| NoiseRule { k: n.k }),
            rate: d.rate.map(|x| RateRule {
                drop_pct_per_day: x.drop_pct_per_day,
                window_days: x.window_days,
                level: x.level,
            }),
            rise: d.rise.map(|x| RiseRule {
                change_pct: x.change_pct,
                clear_change_pct: x.clear_change_pct,
                min_area_m2: x.min_area_m2,
                min_width_spacings: x.min_width_spacings,
                level: x.level,
            }),
            seasonal: d.seasonal.map(|s| SeasonalRule { margin_pct: s.margin_pct }),
            stage: d.stage.map(|s| StageRule { margin_m: s.margin_m }),
            quality: QualityRules {
                silent_after_s: d.quality.silent_after_s,
                max_drop_share: d.quality.max_drop_share,
                electrode_out_of_service: d.quality.electrode_out_of_service,
                clear_after: d.quality.clear_after,
            },
        }
    }
}

/// A line's stored rules.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredRules {
    /// The rules (validated when read).
    pub rules: RuleSet,
    /// Counted up on every change, from 1.
    pub version: i64,
    /// Who changed them last (a user's email, or `cli`).
    pub updated_by: String,
    /// When.
    pub updated_at: DateTime<Utc>,
}

#[derive(sqlx::FromRow)]
struct RulesRow {
    rules: String,
    version: i64,
    updated_by: String,
    updated_at: DateTime<Utc>,
}

/// The line's stored rules; `None` when the line uses the defaults.
pub async fn get(db: &Db, line_id: i64) -> DbResult<Option<StoredRules>> {
    let row: Option<RulesRow> = on_pool!(db, |p| sqlx::query_as::<_, RulesRow>(
        "SELECT rules, version, updated_by, updated_at FROM line_rules WHERE line_id = $1"
    )
    .bind(line_id)
    .fetch_optional(p)
    .await?);
    let Some(row) = row else { return Ok(None) };
    let corrupt = |e: String| DbError::Corrupt { what: format!("rules of line {line_id}: {e}") };
    let dto: RulesDto = serde_json::from_str(&row.rules).map_err(|e| corrupt(e.to_string()))?;
    let rules = RuleSet::from(&dto);
    rules.validate().map_err(|e| corrupt(e.to_string()))?;
    Ok(Some(StoredRules {
        rules,
        version: row.version,
        updated_by: row.updated_by,
        updated_at: row.updated_at,
    }))
}

/// Stores a line's rules (already validated by the caller; checked again
/// here so nothing invalid is ever written) and returns the new version.
pub async fn set(db: &Db, line_id: i64, rules: &RuleSet, updated_by: &str) -> DbResult<i64> {
    rules.validate().map_err(|e| DbError::Corrupt { what: format!("rules refused: {e}") })?;
    let json = serde_json::to_string(&RulesDto::from(rules)).expect("rules serialise");
    let t = now();
    in_tx!(db, |c| {
        let version: Option<i64> =
            sqlx::query_scalar("SELECT version FROM line_rules WHERE line_id = $1")
                .bind(line_id)
                .fetch_optional(&mut *c)
                .await?;
        let next = version.unwrap_or(0) + 1;
        if version.is_some() {
            sqlx::query(
                "UPDATE line_rules SET rules = $1, version = $2, updated_by = $3, updated_at = $4
                 WHERE line_id = $5",
            )
            .bind(&json)
            .bind(next)
            .bind(updated_by)
            .bind(t)
            .bind(line_id)
            .execute(&mut *c)
            .await?;
        } else {
            sqlx::query(
                "INSERT INTO line_rules (line_id, rules, version, updated_by, updated_at)
                 VALUES ($1, $2, $3, $4, $5)",
            )
            .bind(line_id)
            .bind(&json)
            .bind(next)
            .bind(updated_by)
            .bind(t)
            .execute(&mut *c)
            .await?;
        }
        Ok::<_, DbError>(next)
    })
}

/// A cached noise calibration of a line's baseline.
#[derive(Debug, Clone, PartialEq)]
pub struct StoredNoise {
    /// What it was computed from (mode and lateral-contrast settings).
    pub basis: String,
    /// The epochs it was measured over.
    pub epoch_ids: Vec<i64>,
    /// σ per cell, % (`None` where not measured).
    pub sigma: Vec<Option<f64>>,
}

#[derive(sqlx::FromRow)]
struct NoiseRow {
    basis: String,
    epoch_ids: String,
    sigma: String,
}

/// The cached noise calibration of a line's baseline.
pub async fn noise(db: &Db, line_id: i64, baseline_id: i64) -> DbResult<Option<StoredNoise>> {
    let row: Option<NoiseRow> = on_pool!(db, |p| sqlx::query_as::<_, NoiseRow>(
        "SELECT basis, epoch_ids, sigma FROM line_noise WHERE line_id = $1 AND baseline_id = $2"
    )
    .bind(line_id)
    .bind(baseline_id)
    .fetch_optional(p)
    .await?);
    let Some(row) = row else { return Ok(None) };
    let corrupt = |e: serde_json::Error| DbError::Corrupt {
        what: format!("noise calibration of line {line_id}, baseline {baseline_id}: {e}"),
    };
    Ok(Some(StoredNoise {
        basis: row.basis,
        epoch_ids: serde_json::from_str(&row.epoch_ids).map_err(corrupt)?,
        sigma: serde_json::from_str(&row.sigma).map_err(corrupt)?,
    }))
}

/// Stores (or replaces) the noise calibration of a line's baseline.
pub async fn set_noise(
    db: &Db,
    line_id: i64,
    baseline_id: i64,
    noise: &StoredNoise,
) -> DbResult<()> {
    let ids = serde_json::to_string(&noise.epoch_ids).expect("ids serialise");
    let sigma = serde_json::to_string(&noise.sigma).expect("sigma serialises");
    let t = now();
    in_tx!(db, |c| {
        sqlx::query("DELETE FROM line_noise WHERE line_id = $1 AND baseline_id = $2")
            .bind(line_id)
            .bind(baseline_id)
            .execute(&mut *c)
            .await?;
        sqlx::query(
            "INSERT INTO line_noise (line_id, baseline_id, basis, epoch_ids, sigma, created_at)
             VALUES ($1, $2, $3, $4, $5, $6)",
        )
        .bind(line_id)
        .bind(baseline_id)
        .bind(&noise.basis)
        .bind(&ids)
        .bind(&sigma)
        .bind(t)
        .execute(&mut *c)
        .await?;
        Ok::<_, DbError>(())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rules_round_trip_through_json() {
        let r = RuleSet {
            rate: Some(RateRule { drop_pct_per_day: 2.0, window_days: 3.0, level: 2 }),
            rise: Some(RiseRule {
                change_pct: 30.0,
                clear_change_pct: 10.0,
                min_area_m2: 2.0,
                min_width_spacings: 1.5,
                level: 1,
            }),
            ..RuleSet::default()
        };
        let json = serde_json::to_string(&RulesDto::from(&r)).unwrap();
        let back: RulesDto = serde_json::from_str(&json).unwrap();
        assert_eq!(RuleSet::from(&back), r);
        let staged = RuleSet { stage: Some(StageRule { margin_m: 0.5 }), ..r.clone() };
        let json = serde_json::to_string(&RulesDto::from(&staged)).unwrap();
        let back: RulesDto = serde_json::from_str(&json).unwrap();
        assert_eq!(RuleSet::from(&back), staged);
        // Rules stored before the river-stage rule existed read with it off.
        let mut old: serde_json::Value = serde_json::to_value(RulesDto::from(&r)).unwrap();
        old.as_object_mut().unwrap().remove("stage");
        let back: RulesDto = serde_json::from_value(old).unwrap();
        assert_eq!(RuleSet::from(&back), r);
        assert!(serde_json::from_str::<RulesDto>(&json.replace("\"levels\"", "\"lvls\"")).is_err());
    }
}
