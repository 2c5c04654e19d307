//! Scoring a sorting against ground truth (REFERENCES.md S1, common
//! practice): spikes are matched one to one within ±window between a
//! ground-truth unit's train and a sorted unit's train; accuracy is
//! n_match / (n_gt + n_sorted − n_match), precision n_match / n_sorted,
//! recall n_match / n_gt. Each ground-truth unit is paired with the sorted
//! unit of highest accuracy.

use arrow_array::{ArrayRef, Float64Array, Int32Array, Int64Array, RecordBatch};
use arrow_schema::{DataType, Field, Schema};
use spikeyard_contract::table::{column, read_table};
use std::collections::BTreeMap;
use std::path::Path;
use std::sync::Arc;

/// Trains by unit: unit id → ascending samples.
pub type Trains = BTreeMap<i64, Vec<i64>>;

/// Read `unit_id` and `sample` columns of a spikes table into trains.
///
/// # Errors
/// The table is missing or lacks the columns (named with the path).
pub fn read_trains(path: &Path) -> anyhow::Result<Trains> {
    let mut trains = Trains::new();
    for batch in read_table(path)? {
        let units =
            batch.column_by_name("unit_id").ok_or_else(|| anyhow::anyhow!("{}: no column unit_id", path.display()))?;
        let units: Vec<i64> = match units.data_type() {
            DataType::Int32 => {
                column::<Int32Array>(path, &batch, "unit_id")?.values().iter().map(|&u| u as i64).collect()
            }
            _ => column::<Int64Array>(path, &batch, "unit_id")?.values().to_vec(),
        };
        let samples: &Int64Array = column(path, &batch, "sample")?;
        for (unit, &sample) in units.iter().zip(samples.values()) {
            trains.entry(*unit).or_default().push(sample);
        }
    }
    for train in trains.values_mut() {
        train.sort_unstable();
    }
    Ok(trains)
}

/// One-to-one matches between two ascending trains within ±window (greedy
/// in time order, which is optimal for intervals of equal width).
pub fn count_matches(a: &[i64], b: &[i64], window: i64) -> usize {
    let (mut i, mut j, mut matches) = (0, 0, 0);
    while i < a.len() && j < b.len() {
        if b[j] < a[i] - window {
            j += 1;
        } else if a[i] < b[j] - window {
            i += 1;
        } else {
            matches += 1;
            i += 1;
            j += 1;
        }
    }
    matches
}

/// The best sorted unit for one ground-truth unit.
#[derive(Debug, Clone, PartialEq)]
pub struct UnitMatch {
    pub truth_unit: i64,
    pub sorted_unit: Option<i64>,
    pub n_truth: usize,
    pub n_sorted: usize,
    pub n_match: usize,
}

impl UnitMatch {
    pub fn accuracy(&self) -> f64 {
        let denominator = self.n_truth + self.n_sorted - self.n_match;
        if denominator == 0 {
            0.0
        } else {
            self.n_match as f64 / denominator as f64
        }
    }
    pub fn precision(&self) -> f64 {
        if self.n_sorted == 0 {
            0.0
        } else {
            self.n_match as f64 / self.n_sorted as f64
        }
    }
    pub fn recall(&self) -> f64 {
        if self.n_truth == 0 {
            0.0
        } else {
            self.n_match as f64 / self.n_truth as f64
        }
    }
}

/// The comparison of a sorting with the truth.
#[derive(Debug, Clone)]
pub struct Comparison {
    /// One per ground-truth unit.
    pub truth: Vec<UnitMatch>,
    /// Best accuracy of each sorted unit against any ground-truth unit.
    pub sorted_best_accuracy: BTreeMap<i64, f64>,
}

/// Compare trains with a window of `window` samples.
pub fn compare(truth: &Trains, sorted: &Trains, window: i64) -> Comparison {
    let mut sorted_best_accuracy: BTreeMap<i64, f64> = sorted.keys().map(|&u| (u, 0.0)).collect();
    let truth_matches = truth
        .iter()
        .map(|(&truth_unit, gt)| {
            let mut best = UnitMatch { truth_unit, sorted_unit: None, n_truth: gt.len(), n_sorted: 0, n_match: 0 };
            for (&sorted_unit, train) in sorted {
                let n_match = count_matches(gt, train, window);
                if n_match == 0 {
                    continue;
                }
                let candidate = UnitMatch {
                    truth_unit,
                    sorted_unit: Some(sorted_unit),
                    n_truth: gt.len(),
                    n_sorted: train.len(),
                    n_match,
                };
                let accuracy = candidate.accuracy();
                let slot = sorted_best_accuracy.entry(sorted_unit).or_insert(0.0);
                *slot = slot.max(accuracy);
                if accuracy > best.accuracy() {
                    best = candidate;
                }
            }
            best
        })
        .collect();
    Comparison { truth: truth_matches, sorted_best_accuracy }
}

impl Comparison {
    /// The per-ground-truth-unit table.
    pub fn to_batch(&self) -> RecordBatch {
        let rows = &self.truth;
        RecordBatch::try_new(
            Arc::new(Schema::new(vec![
                Field::new("truth_unit", DataType::Int64, false),
                Field::new("sorted_unit", DataType::Int64, true),
                Field::new("n_truth", DataType::Int64, false),
                Field::new("n_sorted", DataType::Int64, false),
                Field::new("n_match", DataType::Int64, false),
                Field::new("accuracy", DataType::Float64, false),
                Field::new("precision", DataType::Float64, false),
                Field::new("recall", DataType::Float64, false),
            ])),
            vec![
                Arc::new(Int64Array::from_iter_values(rows.iter().map(|r| r.truth_unit))) as ArrayRef,
                Arc::new(Int64Array::from_iter(rows.iter().map(|r| r.sorted_unit))),
                Arc::new(Int64Array::from_iter_values(rows.iter().map(|r| r.n_truth as i64))),
                Arc::new(Int64Array::from_iter_values(rows.iter().map(|r| r.n_sorted as i64))),
                Arc::new(Int64Array::from_iter_values(rows.iter().map(|r| r.n_match as i64))),
                Arc::new(Float64Array::from_iter_values(rows.iter().map(UnitMatch::accuracy))),
                Arc::new(Float64Array::from_iter_values(rows.iter().map(UnitMatch::precision))),
                Arc::new(Float64Array::from_iter_values(rows.iter().map(UnitMatch::recall))),
            ],
        )
        .expect("comparison columns match their schema")
    }

    /// A printable table.
    pub fn describe(&self) -> String {
        let mut text = format!(
            "{:>10} {:>11} {:>7} {:>7} {:>7} {:>9} {:>9} {:>7}\n",
            "truth unit", "sorted unit", "n_truth", "n_sorted", "n_match", "accuracy", "precision", "recall"
        );
        for r in &self.truth {
            let sorted = r.sorted_unit.map_or("-".to_string(), |u| u.to_string());
            text.push_str(&format!(
                "{:>10} {:>11} {:>7} {:>7} {:>7} {:>9.3} {:>9.3} {:>7.3}\n",
                r.truth_unit,
                sorted,
                r.n_truth,
                r.n_sorted,
                r.n_match,
                r.accuracy(),
                r.precision(),
                r.recall()
            ));
        }
        text
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // REFERENCES.md S1: n_gt=100, n_sorted=95, n_match=90.
    #[test]
    fn accuracy_precision_recall_of_the_worked_example() {
        let m = UnitMatch { truth_unit: 0, sorted_unit: Some(0), n_truth: 100, n_sorted: 95, n_match: 90 };
        assert!((m.accuracy() - 0.8571428571428571).abs() < 1e-15);
        assert!((m.precision() - 0.9473684210526315).abs() < 1e-15);
        assert!((m.recall() - 0.9).abs() < 1e-15);
    }

    // REFERENCES.md S1: a train shifted by 0.3 ms scores 1.0 at ±0.4 ms and 0.0 at ±0.2 ms (20 kHz).
    #[test]
    fn shifted_train_matches_only_within_the_window() {
        let truth: Vec<i64> = (0..50).map(|i| i * 1000).collect();
        let shifted: Vec<i64> = truth.iter().map(|s| s + 6).collect();
        let t = Trains::from([(1, truth)]);
        let s = Trains::from([(7, shifted)]);
        assert_eq!(compare(&t, &s, 8).truth[0].accuracy(), 1.0);
        assert_eq!(compare(&t, &s, 4).truth[0].accuracy(), 0.0);
    }

    #[test]
    fn matching_is_one_to_one() {
        assert_eq!(count_matches(&[100], &[98, 101], 5), 1);
        assert_eq!(count_matches(&[100, 104], &[102], 5), 1);
        assert_eq!(count_matches(&[], &[1], 5), 0);
    }
}
