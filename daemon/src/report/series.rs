//! Bounded-memory decimation of long series for plots.
//!
//! [`Decimator`] keeps at most `2·buckets` buckets of `width` consecutive samples, each
//! holding the mean, minimum and maximum of every channel. When it fills up, neighbouring
//! buckets are merged pairwise and the width doubles, so a run of any length ends with
//! between `buckets` and `2·buckets` points per channel — memory does not grow with the run.

use serde::Serialize;

/// One bucket: the x value (mean) and each channel's mean, min and max.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Bucket {
    /// Mean of x (e.g. time, h) over the bucket.
    pub x: f64,
    /// Mean of each channel.
    pub mean: Vec<f64>,
    /// Minimum of each channel.
    pub min: Vec<f64>,
    /// Maximum of each channel.
    pub max: Vec<f64>,
}

#[derive(Debug, Clone)]
struct Acc {
    sx: f64,
    n: u64,
    sum: Vec<f64>,
    cnt: Vec<u64>,
    min: Vec<f64>,
    max: Vec<f64>,
    /// Samples offered to this bucket (usable or not): decides when it is full.
    taken: u64,
}

impl Acc {
    fn new(ch: usize) -> Self {
        Acc {
            sx: 0.0,
            n: 0,
            sum: vec![0.0; ch],
            cnt: vec![0; ch],
            min: vec![f64::INFINITY; ch],
            max: vec![f64::NEG_INFINITY; ch],
            taken: 0,
        }
    }
    fn merge(&mut self, o: &Acc) {
        self.sx += o.sx;
        self.n += o.n;
        self.taken += o.taken;
        for c in 0..self.sum.len() {
            self.sum[c] += o.sum[c];
            self.cnt[c] += o.cnt[c];
            self.min[c] = self.min[c].min(o.min[c]);
            self.max[c] = self.max[c].max(o.max[c]);
        }
    }
    fn bucket(&self) -> Option<Bucket> {
        (self.n > 0).then(|| {
            let f = |c: usize, v: f64| if self.cnt[c] > 0 { v } else { f64::NAN };
            Bucket {
                x: self.sx / self.n as f64,
                mean: (0..self.sum.len())
                    .map(|c| f(c, self.sum[c] / self.cnt[c].max(1) as f64))
                    .collect(),
                min: (0..self.sum.len()).map(|c| f(c, self.min[c])).collect(),
                max: (0..self.sum.len()).map(|c| f(c, self.max[c])).collect(),
            }
        })
    }
}

/// Streaming decimator of `channels` series sharing one x.
#[derive(Debug, Clone)]
pub struct Decimator {
    channels: usize,
    buckets: usize,
    width: u64,
    done: Vec<Acc>,
    cur: Acc,
}

impl Decimator {
    /// A decimator that ends with `buckets` … `2·buckets` points (at least 2).
    pub fn new(channels: usize, buckets: usize) -> Self {
        Decimator {
            channels,
            buckets: buckets.max(2),
            width: 1,
            done: Vec::new(),
            cur: Acc::new(channels),
        }
    }

    /// Adds one sample: x and one value per channel (non-finite values are skipped, but
    /// the sample still counts towards the bucket's width).
    pub fn push(&mut self, x: f64, values: &[f64]) {
        let a = &mut self.cur;
        a.taken += 1;
        if x.is_finite() {
            a.sx += x;
            a.n += 1;
        }
        for (c, &v) in values.iter().enumerate().take(self.channels) {
            if v.is_finite() {
                a.sum[c] += v;
                a.cnt[c] += 1;
                a.min[c] = a.min[c].min(v);
                a.max[c] = a.max[c].max(v);
            }
        }
        if a.taken >= self.width {
            let full = std::mem::replace(&mut self.cur, Acc::new(self.channels));
            self.done.push(full);
            if self.done.len() >= 2 * self.buckets {
                let old = std::mem::take(&mut self.done);
                for pair in old.chunks(2) {
                    let mut m = pair[0].clone();
                    if let Some(b) = pair.get(1) {
                        m.merge(b);
                    }
                    self.done.push(m);
                }
                self.width *= 2;
            }
        }
    }

    /// The buckets so far, in order.
    pub fn buckets(&self) -> Vec<Bucket> {
        self.done
            .iter()
            .chain(std::iter::once(&self.cur))
            .filter_map(Acc::bucket)
            .collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn memory_is_bounded_and_extremes_survive() {
        let mut d = Decimator::new(1, 100);
        let n = 1_000_003u64;
        for i in 0..n {
            let v = if i == 777_777 { 50.0 } else { (i % 10) as f64 };
            d.push(i as f64, &[v]);
        }
        let b = d.buckets();
        assert!(b.len() >= 100 && b.len() <= 201, "{}", b.len());
        let max = b.iter().map(|x| x.max[0]).fold(f64::MIN, f64::max);
        assert_eq!(max, 50.0);
        // The overall mean of 0..9 repeated is 4.5 (exact arithmetic, each bucket holds whole decades
        // except possibly the edges).
        let mean: f64 = b.iter().map(|x| x.mean[0]).sum::<f64>() / b.len() as f64;
        assert!((mean - 4.5).abs() < 0.1, "{mean}");
        assert!(b.windows(2).all(|w| w[1].x > w[0].x));
    }
}
