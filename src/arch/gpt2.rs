//! Placeholder until the Gpt2 family lands.

use super::{ArchConfig, ArchError, ArchErrorKind, Result, Weights};

/// A loaded Gpt2-style decoder.
pub struct Gpt2;

impl Gpt2 {
    /// Build from the config and the model's tensors.
    pub fn new(cfg: &ArchConfig, _w: &Weights<'_>) -> Result<Self> {
        Err(ArchError::new(
            ArchErrorKind::Unsupported,
            format!("{}: model_type '{}' is not implemented yet", cfg.path, cfg.model_type),
        ))
    }
}

impl super::Network for Gpt2 {
    fn family(&self) -> super::Family {
        unreachable!()
    }
    fn kind(&self) -> super::Kind {
        unreachable!()
    }
    fn num_blocks(&self) -> usize {
        unreachable!()
    }
    fn groups(&self, _b: usize) -> Vec<super::Group> {
        unreachable!()
    }
    fn embed(&self, _batch: &super::Batch) -> Result<candle_core::Tensor> {
        unreachable!()
    }
    fn block(
        &self,
        _b: usize,
        _x: &candle_core::Tensor,
        _tap: &mut super::Tap<'_>,
    ) -> Result<candle_core::Tensor> {
        unreachable!()
    }
    fn output(&self, _x: &candle_core::Tensor) -> Result<candle_core::Tensor> {
        unreachable!()
    }
    fn linear(&self, _name: &str) -> Option<&super::Linear> {
        unreachable!()
    }
    fn set_weight(&mut self, _name: &str, _values: &[f32]) -> Result<()> {
        unreachable!()
    }
}
