//! The `buffer` stage: block processing between converter and DAC (a driver's or a DSP's round trip).
//!
//! Codes are gathered into blocks of `block` codes; a block is handed on when its last code arrives, and
//! `blocks` blocks are queued between the input and the output (the block being filled, the ones being
//! processed, the one being played). Each code is played out `blocks` x `block` sample periods after it
//! arrived, at the pace it arrived: the delay is exactly `blocks * block / fs` for every sample, with fs the
//! rate the codes arrive at (the ADC's). A partial block at the end of a run never leaves.
//!
//! Delay from block buffering as a whole number of block periods: common practice, no source.

use serde::Serialize;

use crate::engine::pipeline::si;
use crate::error::{Error, Result};
use crate::format::reader::{ScenarioError, TableReader};
use crate::signal::stream::CodeEvent;
use crate::stages::kind::{BuildContext, KindSpec, Param, ParamKind, ReadContext, Role, Runtime};
use crate::stages::roles::{BudgetLine, CodeStage};

/// Longest block (samples).
pub const MAX_BLOCK: i128 = 1 << 20;
/// Most blocks queued.
pub const MAX_BLOCKS: i128 = 1024;

/// `kind = "buffer"`: block processing with blocks queued.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct BufferCfg {
    /// Samples per block.
    pub block: u32,
    /// Blocks queued between the input and the output.
    pub blocks: u32,
}

impl BufferCfg {
    /// The delay every code takes through the buffer, for codes arriving at `sample_rate_hz` (s).
    pub fn delay_s(&self, sample_rate_hz: f64) -> f64 {
        f64::from(self.blocks) * f64::from(self.block) / sample_rate_hz
    }
}

impl KindSpec for BufferCfg {
    const NAME: &'static str = "buffer";
    const ROLE: Role = Role::Code;
    const EXAMPLE: &'static str = r#"block = 32
blocks = 2"#;
    const PARAMS: &'static [Param] = &[
        Param::fixed("block", ParamKind::Integer),
        Param::fixed("blocks", ParamKind::Integer),
    ];

    fn read(
        r: &mut TableReader<'_, '_>,
        _ctx: &ReadContext,
    ) -> std::result::Result<Self, ScenarioError> {
        let block = r
            .integer("block", 1, MAX_BLOCK)?
            .ok_or_else(|| r.missing("block", "64"))?
            .value as u32;
        let blocks = r
            .integer("blocks", 1, MAX_BLOCKS)?
            .map_or(2, |b| b.value as u32);
        Ok(BufferCfg { block, blocks })
    }

    fn transport_s(&self, sample_rate_hz: f64) -> f64 {
        self.delay_s(sample_rate_hz)
    }

    fn build(&self, ctx: &mut BuildContext) -> Result<Runtime> {
        let fs = ctx.upstream.sample_rate_hz.ok_or_else(|| {
            Error::BadInput(format!("{}: a buffer needs an ADC before it", ctx.label))
        })?;
        Ok(Runtime::Code(Box::new(Buffer::new(
            self,
            fs,
            ctx.label.clone(),
        ))))
    }
}

/// A block buffer: delays every code by `blocks * block / fs`, handing codes on a block at a time.
#[derive(Debug, Clone)]
pub struct Buffer {
    cfg: BufferCfg,
    delay_s: f64,
    /// The block being filled (capacity `block`, reused).
    pending: Vec<CodeEvent>,
    label: String,
}

impl Buffer {
    /// A buffer for codes arriving at `sample_rate_hz`.
    pub fn new(cfg: &BufferCfg, sample_rate_hz: f64, label: String) -> Buffer {
        let block = cfg.block.max(1) as usize;
        Buffer {
            cfg: *cfg,
            delay_s: cfg.delay_s(sample_rate_hz),
            pending: Vec::with_capacity(block),
            label,
        }
    }
}

impl CodeStage for Buffer {
    /// Gather the code; when the block is full, hand it on, each code `delay_s` after its own arrival (never
    /// before the block's last code arrived, since the delay is at least one block).
    fn push(&mut self, ev: CodeEvent, out: &mut Vec<CodeEvent>) {
        self.pending.push(ev);
        if self.pending.len() >= self.cfg.block.max(1) as usize {
            let d = self.delay_s;
            out.extend(self.pending.drain(..).map(|e| CodeEvent {
                t_avail_s: e.t_avail_s + d,
                ..e
            }));
        }
    }

    fn budget(&self, sample_rate_hz: f64) -> Vec<BudgetLine> {
        vec![BudgetLine {
            stage: format!(
                "{}: {} block{} of {} samples at {}",
                self.label,
                self.cfg.blocks,
                if self.cfg.blocks == 1 { "" } else { "s" },
                self.cfg.block,
                si(sample_rate_hz, "Hz")
            ),
            seconds: self.cfg.delay_s(sample_rate_hz),
        }]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn stream(n: usize, rate: f64) -> Vec<CodeEvent> {
        (0..n)
            .map(|k| {
                let t = k as f64 / rate;
                CodeEvent {
                    t_sample_s: t,
                    t_avail_s: t + 0.25 / rate,
                    code: (k * 7 % 1024) as u32,
                }
            })
            .collect()
    }

    #[test]
    fn every_code_is_delayed_by_the_queued_blocks_and_leaves_a_block_at_a_time() {
        // 3 blocks of 64 at 48 kHz: 192 / 48000 = 4 ms exactly.
        let fs = 48e3;
        let cfg = BufferCfg {
            block: 64,
            blocks: 3,
        };
        let mut b = Buffer::new(&cfg, fs, "b".into());
        let evs = stream(64 * 5 + 10, fs);
        let mut out = Vec::new();
        for (k, e) in evs.iter().enumerate() {
            b.push(*e, &mut out);
            assert_eq!(out.len(), (k + 1) / 64 * 64, "after {} codes", k + 1);
            // Nothing leaves before it arrived, nor before its block is complete.
            if let Some(last) = out.last() {
                assert!(last.t_avail_s >= e.t_avail_s);
            }
        }
        assert_eq!(out.len(), 320, "the partial block stays");
        for (a, o) in evs.iter().zip(&out) {
            assert_eq!(o.code, a.code);
            assert_eq!(o.t_sample_s, a.t_sample_s);
            assert!((o.t_avail_s - a.t_avail_s - 4e-3).abs() < 1e-12);
        }
        let budget = b.budget(fs);
        assert_eq!(budget.len(), 1);
        assert!((budget[0].seconds - 4e-3).abs() < 1e-15);
        assert!(budget[0].stage.contains("3 blocks of 64 samples"));
    }
}
