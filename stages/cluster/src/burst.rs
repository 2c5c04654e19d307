//! Burst tails: a neuron's later, smaller spikes in its own bursts.
//!
//! Within a burst a neuron's spikes shrink (its sodium channels have not
//! recovered), often enough to be clustered apart from its first spikes.
//! The smaller unit then fires only inside the larger one's bursts: its
//! spikes come after one of the larger unit's (directly, or through a chain
//! of burst intervals), and are almost never followed by one of them, since
//! a burst does not grow again. A different neuron that fires in the same
//! network bursts interleaves with it both ways and is left apart.

/// When a smaller unit is a larger one's burst tail.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BurstRules {
    /// Longest interval within a burst, frames.
    pub max_isi_frames: u64,
    /// At least this share of the tail's spikes follow the larger unit's in a burst ...
    pub min_following: f64,
    /// ... and at most this share are followed by one of them within max_isi.
    pub max_followed: f64,
}

/// Share of `tail`'s spikes that end a burst chain (intervals of at most
/// `max_isi` frames through either train) started by a `head` spike, and
/// share followed by a `head` spike within `max_isi`. Both trains are
/// ascending sample numbers.
pub fn burst_shares(head: &[u64], tail: &[u64], max_isi: u64) -> (f64, f64) {
    if tail.is_empty() {
        return (0.0, 0.0);
    }
    let (mut following, mut followed) = (0usize, 0usize);
    // Walk both trains in time order, remembering whether the current
    // chain of short intervals holds a head spike.
    let (mut i, mut j) = (0usize, 0usize);
    let mut last: Option<u64> = None;
    let mut chain_has_head = false;
    while j < tail.len() {
        let head_next = head.get(i).copied().filter(|&h| h <= tail[j]);
        let (t, is_head) = match head_next {
            Some(h) => {
                i += 1;
                (h, true)
            }
            None => {
                j += 1;
                (tail[j - 1], false)
            }
        };
        if last.is_none_or(|l| t - l > max_isi) {
            chain_has_head = false;
        }
        last = Some(t);
        if is_head {
            chain_has_head = true;
        } else {
            following += chain_has_head as usize;
            let next_head = head.partition_point(|&h| h <= t);
            followed += head.get(next_head).is_some_and(|&h| h - t <= max_isi) as usize;
        }
    }
    (following as f64 / tail.len() as f64, followed as f64 / tail.len() as f64)
}

/// Whether `tail` is `head`'s burst tail by its timing alone (the caller
/// checks that the two look alike).
pub fn is_burst_tail(head: &[u64], tail: &[u64], rules: &BurstRules) -> bool {
    let (following, followed) = burst_shares(head, tail, rules.max_isi_frames);
    following >= rules.min_following && followed <= rules.max_followed
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shares_follow_chains_of_short_intervals() {
        // Bursts 100, 110(t), 118(t); 500, 560(t: too late); lone tail 900, then head 905.
        let head = [100, 500, 905];
        let tail = [110, 118, 560, 900];
        let (following, followed) = burst_shares(&head, &tail, 20);
        assert_eq!((following, followed), (0.5, 0.25));
    }

    #[test]
    fn a_shrinking_burst_is_a_tail_and_an_interleaved_partner_is_not() {
        let rules = BurstRules { max_isi_frames: 400, min_following: 0.8, max_followed: 0.4 };
        let starts: Vec<u64> = (0..100).map(|k| 10_000 + k * 20_000).collect();
        let tail: Vec<u64> = starts.iter().flat_map(|&s| [s + 150, s + 320]).collect();
        assert!(is_burst_tail(&starts, &tail, &rules));
        // A neuron firing in the same network bursts, before and after.
        let partner: Vec<u64> = starts.iter().flat_map(|&s| [s - 100, s + 200]).collect();
        assert!(!is_burst_tail(&starts, &partner, &rules));
        // And one firing on its own.
        let lone: Vec<u64> = starts.iter().map(|&s| s + 9_000).collect();
        assert!(!is_burst_tail(&starts, &lone, &rules));
    }
}
