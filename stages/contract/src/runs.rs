//! Cutting several buffers into the same runs, so that parallel tasks can
//! each own one run of every buffer.

/// Cut each buffer into runs of `run_len` (the last one shorter) and group
/// them by run: entry r holds run r of every buffer that has one, in buffer
/// order.
pub fn group_runs<'a, T>(buffers: impl IntoIterator<Item = &'a mut [T]>, run_len: usize) -> Vec<Vec<&'a mut [T]>> {
    let mut runs: Vec<Vec<&'a mut [T]>> = Vec::new();
    for buffer in buffers {
        for (run, part) in buffer.chunks_mut(run_len.max(1)).enumerate() {
            if runs.len() <= run {
                runs.push(Vec::new());
            }
            runs[run].push(part);
        }
    }
    runs
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_hold_the_same_stretch_of_every_buffer() {
        let (mut a, mut b) = (vec![0, 1, 2, 3, 4], vec![10, 11, 12]);
        let runs = group_runs([a.as_mut_slice(), b.as_mut_slice()], 2);
        let seen: Vec<Vec<Vec<i32>>> = runs.iter().map(|r| r.iter().map(|p| p.to_vec()).collect()).collect();
        assert_eq!(seen, vec![vec![vec![0, 1], vec![10, 11]], vec![vec![2, 3], vec![12]], vec![vec![4]]]);
    }
}
