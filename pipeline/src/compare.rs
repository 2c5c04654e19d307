//! Scoring a sorting against ground truth (REFERENCES.md S1, common
//! practice): spikes are matched one to one within ±window between a
//! ground-truth unit's train and a sorted unit's train; accuracy is
//! n_match / (n_gt + n_sorted − n_match), precision n_match / n_sorted,
//! recall n_match / n_gt. Each ground-truth unit is paired with the sorted
//! unit of highest accuracy.
//!
//! Every sorted unit is scored too, none left out: it **merges** neurons
//! when it holds at least half the spikes of two or more ground-truth units
//! (each at least a tenth of its own spikes), and it is **false** when it
//! merges none and reaches accuracy 0.5 with no ground-truth unit (a
//! fragment, a duplicate, an echo, noise).

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
    /// Every sorted unit's spikes and the ground-truth units it merges.
    pub sorted: BTreeMap<i64, SortedScore>,
}

/// One sorted unit against the ground truth.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SortedScore {
    pub n_spikes: usize,
    /// Ground-truth units of which it holds at least half the spikes, each
    /// making at least a tenth of its own.
    pub holds: Vec<i64>,
}

/// What the sorted units amount to.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct UnitCounts {
    pub units: usize,
    /// Units that merge two or more ground-truth units.
    pub merging: usize,
    /// Units that merge none and match none at accuracy ≥ 0.5.
    pub false_units: usize,
    /// Share of all sorted spikes that are in false units.
    pub false_spike_share: f64,
}

/// Compare trains with a window of `window` samples.
pub fn compare(truth: &Trains, sorted: &Trains, window: i64) -> Comparison {
    let mut sorted_best_accuracy: BTreeMap<i64, f64> = sorted.keys().map(|&u| (u, 0.0)).collect();
    let mut scores: BTreeMap<i64, SortedScore> =
        sorted.iter().map(|(&u, train)| (u, SortedScore { n_spikes: train.len(), holds: Vec::new() })).collect();
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
                if 2 * n_match >= gt.len() && 10 * n_match >= train.len() {
                    scores.entry(sorted_unit).or_default().holds.push(truth_unit);
                }
                if accuracy > best.accuracy() {
                    best = candidate;
                }
            }
            best
        })
        .collect();
    Comparison { truth: truth_matches, sorted_best_accuracy, sorted: scores }
}

impl Comparison {
    /// Every sorted unit counted: merging, false, and the false units' share of spikes.
    pub fn unit_counts(&self) -> UnitCounts {
        let merging = self.sorted.values().filter(|s| s.holds.len() >= 2).count();
        let false_units: Vec<&i64> = self
            .sorted
            .iter()
            .filter(|(u, s)| s.holds.len() < 2 && self.sorted_best_accuracy.get(u).is_none_or(|&a| a < 0.5))
            .map(|(u, _)| u)
            .collect();
        let total: usize = self.sorted.values().map(|s| s.n_spikes).sum();
        let in_false: usize = false_units.iter().map(|u| self.sorted[u].n_spikes).sum();
        UnitCounts {
            units: self.sorted.len(),
            merging,
            false_units: false_units.len(),
            false_spike_share: if total == 0 { 0.0 } else { in_false as f64 / total as f64 },
        }
    }

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
    fn every_sorted_unit_is_counted_as_a_match_a_merge_or_false() {
        let a: Vec<i64> = (0..100).map(|i| i * 1000).collect();
        let b: Vec<i64> = (0..100).map(|i| i * 1000 + 500).collect();
        let truth = Trains::from([(0, a.clone()), (1, b.clone())]);
        let mut both = [a.clone(), b].concat();
        both.sort_unstable();
        let fragment: Vec<i64> = a.iter().take(10).copied().collect();
        let noise: Vec<i64> = (0..30).map(|i| i * 1000 + 250).collect();
        let sorted = Trains::from([(0, a), (1, both), (2, fragment), (3, noise)]);
        let comparison = compare(&truth, &sorted, 5);
        assert_eq!(comparison.sorted[&1].holds, vec![0, 1]);
        let counts = comparison.unit_counts();
        // Unit 0 matches, 1 merges, 2 (a tenth of a neuron) and 3 are false: 40 of 340 spikes.
        assert_eq!((counts.units, counts.merging, counts.false_units), (4, 1, 2));
        assert!((counts.false_spike_share - 40.0 / 340.0).abs() < 1e-12);
    }

    #[test]
    fn matching_is_one_to_one() {
        assert_eq!(count_matches(&[100], &[98, 101], 5), 1);
        assert_eq!(count_matches(&[100, 104], &[102], 5), 1);
        assert_eq!(count_matches(&[], &[1], 5), 0);
    }
}
