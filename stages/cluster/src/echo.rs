//! Echoes: units that are another unit's spikes seen again elsewhere.
//!
//! A neuron's spike is seen on the electrodes along its axon a fixed
//! conduction delay after the soma's, and on a dense array again on
//! electrodes beyond the detection's merge radius at nearly no delay. Such
//! a "unit" fires when, and only when, its source does, at one lag with a
//! jitter of a few samples: in the cross-correlogram of the two trains most
//! of its spikes sit in one narrow peak. Units that merely fire together (in
//! network bursts, or driven through a synapse) spread over milliseconds
//! and are left apart.
//!
//! [`find_echoes`] counts the cross-correlograms of every pair of units
//! within ±`max_lag` in one pass over the spikes (in sample order), finds
//! each pair's densest window of ±`jitter` frames, and calls the unit with
//! the larger share of its spikes in that window an echo of the other when
//! the share and the window's part of the correlogram pass the rules. The
//! source is the one that fires first (where the spike starts), or on a
//! tie of timing the larger one.

use std::collections::HashMap;

/// When a unit is an echo of another.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EchoRules {
    /// Correlograms span ±this many frames.
    pub max_lag_frames: u64,
    /// Half width of the peak window, frames.
    pub jitter_frames: u64,
    /// The echo has at least this share of its spikes in the peak window.
    pub min_locked_fraction: f64,
    /// The peak window holds at least this share of the pair's correlogram.
    pub min_peak_share: f64,
    /// ... and at least this many spikes (fewer cannot show a link).
    pub min_locked_spikes: usize,
}

/// A unit found to be an echo of another.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Echo {
    pub echo: usize,
    pub source: usize,
    /// Echo time minus source time at the peak, frames (mean over the window).
    pub lag_frames: f64,
    /// Half width of the peak window, frames (the rule's jitter).
    pub window_frames: u64,
    /// Source spikes with an echo spike in the peak window.
    pub locked: usize,
    /// Standard deviation of the lag within the window, frames.
    pub jitter_sd_frames: f64,
}

/// Cross-correlograms of every pair of units with a spike of each within
/// ±`max_lag` frames: for pair (a, b), a < b, counts of (b's time − a's
/// time) + max_lag. `spikes` are (sample, unit) in ascending sample order.
pub fn cross_correlograms(spikes: &[(u64, usize)], max_lag: u64) -> HashMap<(usize, usize), Vec<u32>> {
    let bins = 2 * max_lag as usize + 1;
    let mut correlograms: HashMap<(usize, usize), Vec<u32>> = HashMap::new();
    for (i, &(t, u)) in spikes.iter().enumerate() {
        for &(t2, v) in spikes[i + 1..].iter().take_while(|s| s.0 <= t + max_lag) {
            if u == v {
                continue;
            }
            let lag = (t2 - t) as i64;
            let (key, lag) = if u < v { ((u, v), lag) } else { ((v, u), -lag) };
            correlograms.entry(key).or_insert_with(|| vec![0; bins])[(lag + max_lag as i64) as usize] += 1;
        }
    }
    correlograms
}

/// Every echo among the units, most locked first. `n_spikes` and
/// `amplitudes_uv` (template troughs, negative) are per unit; an echo's own
/// echoes are listed too, so follow the sources to the root.
pub fn find_echoes(spikes: &[(u64, usize)], n_spikes: &[usize], amplitudes_uv: &[f64], rules: &EchoRules) -> Vec<Echo> {
    let max_lag = rules.max_lag_frames as i64;
    let jitter = rules.jitter_frames as i64;
    let mut correlograms: Vec<((usize, usize), Vec<u32>)> =
        cross_correlograms(spikes, rules.max_lag_frames).into_iter().collect();
    correlograms.sort_unstable_by_key(|(key, _)| *key);
    let mut echoes = Vec::new();
    for ((a, b), counts) in correlograms {
        let total: u64 = counts.iter().map(|&c| c as u64).sum();
        // Densest window of 2·jitter + 1 bins (the first one on ties).
        let width = (2 * jitter + 1) as usize;
        let mut window: u64 = counts[..width.min(counts.len())].iter().map(|&c| c as u64).sum();
        let (mut best, mut best_start) = (window, 0usize);
        for start in 1..counts.len().saturating_sub(width - 1) {
            window = window + counts[start + width - 1] as u64 - counts[start - 1] as u64;
            if window > best {
                (best, best_start) = (window, start);
            }
        }
        if best == 0 || (best as usize) < rules.min_locked_spikes || (best as f64) < rules.min_peak_share * total as f64
        {
            continue;
        }
        let peak = &counts[best_start..best_start + width];
        let lag_of = |i: usize| (best_start + i) as f64 - max_lag as f64;
        let mean = peak.iter().enumerate().map(|(i, &c)| c as f64 * lag_of(i)).sum::<f64>() / best as f64;
        let variance =
            peak.iter().enumerate().map(|(i, &c)| c as f64 * (lag_of(i) - mean).powi(2)).sum::<f64>() / best as f64;
        let share = |unit: usize| best as f64 / n_spikes[unit].max(1) as f64;
        let (a_locked, b_locked) = (share(a) >= rules.min_locked_fraction, share(b) >= rules.min_locked_fraction);
        // Who is the echo: the one explained by the other; when both are,
        // the later one, or on a tie of timing (within the jitter) the smaller.
        let b_is_echo = match (a_locked, b_locked) {
            (false, false) => continue,
            (true, false) => false,
            (false, true) => true,
            (true, true) if mean.abs() > jitter as f64 => mean > 0.0,
            (true, true) => amplitudes_uv[b].abs() <= amplitudes_uv[a].abs(),
        };
        let (echo, source, lag_frames) = if b_is_echo { (b, a, mean) } else { (a, b, -mean) };
        echoes.push(Echo {
            echo,
            source,
            lag_frames,
            window_frames: rules.jitter_frames,
            locked: best as usize,
            jitter_sd_frames: variance.sqrt(),
        });
    }
    echoes.sort_by(|x, y| {
        let fraction = |e: &Echo| e.locked as f64 / n_spikes[e.echo].max(1) as f64;
        fraction(y).total_cmp(&fraction(x)).then((x.echo, x.source).cmp(&(y.echo, y.source)))
    });
    echoes
}

/// Settle a list of echoes (most locked first) into a forest: each unit is
/// folded at most once, into a source that is not itself folded, so that
/// no cycle forms. Returns, per unit, the echo that folds it (if any).
pub fn settle(echoes: &[Echo], n_units: usize) -> Vec<Option<Echo>> {
    let mut folded: Vec<Option<Echo>> = vec![None; n_units];
    let mut is_source = vec![false; n_units];
    for echo in echoes {
        // A unit already folded, a source already folded into another, or an
        // echo that others are folded into stays as it is: one level only.
        if folded[echo.echo].is_some() || folded[echo.source].is_some() || is_source[echo.echo] {
            continue;
        }
        folded[echo.echo] = Some(*echo);
        is_source[echo.source] = true;
    }
    folded
}

#[cfg(test)]
mod tests {
    use super::*;
    use spikeyard_contract::testing::TestRng;

    const RULES: EchoRules = EchoRules {
        max_lag_frames: 100,
        jitter_frames: 4,
        min_locked_fraction: 0.5,
        min_peak_share: 0.5,
        min_locked_spikes: 10,
    };

    /// A train of `n` spikes within `frames`, at least 40 frames apart.
    fn train(rng: &mut TestRng, n: usize, frames: u64) -> Vec<u64> {
        let mut t = 0u64;
        let mut out = Vec::new();
        while out.len() < n {
            t += 40 + (rng.uniform() * frames as f64 / n as f64) as u64;
            out.push(t);
        }
        out
    }

    fn sorted(trains: &[Vec<u64>]) -> (Vec<(u64, usize)>, Vec<usize>) {
        let mut spikes: Vec<(u64, usize)> =
            trains.iter().enumerate().flat_map(|(u, t)| t.iter().map(move |&s| (s, u))).collect();
        spikes.sort_unstable();
        (spikes, trains.iter().map(Vec::len).collect())
    }

    #[test]
    fn correlogram_counts_lags_of_the_later_unit_by_pair() {
        let spikes = vec![(10, 0), (12, 1), (13, 0), (30, 1)];
        let correlograms = cross_correlograms(&spikes, 5);
        let counts = &correlograms[&(0, 1)];
        // 12 − 10 = +2, 12 − 13 = −1; 30 is too far from both.
        assert_eq!(counts.len(), 11);
        assert_eq!((counts[5 + 2], counts[5 - 1], counts.iter().sum::<u32>()), (1, 1, 2));
    }

    // An axon's unit: 70 % of the soma's spikes seen 30 frames later with a
    // jitter of ±2 frames, plus a few of its own; a unit firing in the same
    // bursts but spread over ±80 frames; an independent unit.
    #[test]
    fn a_time_locked_unit_is_an_echo_and_a_burst_partner_is_not() {
        let mut rng = TestRng::new(4);
        let frames = 2_000_000;
        let soma = train(&mut rng, 400, frames);
        let mut axon = Vec::new();
        for &t in &soma {
            if rng.uniform() < 0.7 {
                axon.push(t + 30 + (rng.uniform() * 5.0) as u64 - 2);
            }
        }
        axon.extend(train(&mut rng, 20, frames));
        axon.sort_unstable();
        let partner: Vec<u64> = soma.iter().map(|&t| t + 20 + (rng.uniform() * 160.0) as u64).collect();
        let other = train(&mut rng, 300, frames);
        let (spikes, n_spikes) = sorted(&[soma, axon, partner, other]);
        let echoes = find_echoes(&spikes, &n_spikes, &[-100.0, -30.0, -80.0, -60.0], &RULES);
        assert_eq!(echoes.len(), 1, "{echoes:?}");
        let echo = echoes[0];
        assert_eq!((echo.echo, echo.source), (1, 0));
        assert!((echo.lag_frames - 30.0).abs() < 0.5 && echo.jitter_sd_frames < 2.0, "{echo:?}");
    }

    // The same spikes detected twice at no delay: the smaller is the echo.
    // Seen before its source, a unit is still folded into the one that explains it.
    #[test]
    fn simultaneous_copy_folds_into_the_larger_and_a_leading_partial_copy_into_its_source() {
        let mut rng = TestRng::new(9);
        let a = train(&mut rng, 300, 1_000_000);
        let copy: Vec<u64> = a.iter().map(|&t| t + 1).collect();
        let leading: Vec<u64> = a.iter().step_by(3).map(|&t| t - 20).collect();
        let (spikes, n_spikes) = sorted(&[copy, a, leading]);
        let echoes = find_echoes(&spikes, &n_spikes, &[-40.0, -90.0, -20.0], &RULES);
        let pairs: Vec<(usize, usize)> = echoes.iter().map(|e| (e.echo, e.source)).collect();
        assert!(pairs.contains(&(0, 1)) && pairs.contains(&(2, 1)), "{pairs:?}");
        let folded = settle(&echoes, 3);
        assert_eq!(folded.iter().map(|f| f.map(|e| e.source)).collect::<Vec<_>>(), vec![Some(1), None, Some(1)]);
    }

    #[test]
    fn settling_folds_one_level_only() {
        let echo =
            |echo, source| Echo { echo, source, lag_frames: 0.0, window_frames: 4, locked: 10, jitter_sd_frames: 0.0 };
        // 1 → 0 first; then 2 → 1 is refused (1 is folded), 0 → 3 is refused (0 is a source).
        let folded = settle(&[echo(1, 0), echo(2, 1), echo(0, 3)], 4);
        assert_eq!(folded.iter().map(|f| f.map(|e| e.source)).collect::<Vec<_>>(), vec![None, Some(0), None, None]);
    }
}
