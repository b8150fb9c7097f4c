//! Lowering: float graph plus calibrated ranges to the int8 [`QGraph`].

pub mod ir;

pub use ir::{
    ChannelTransform, Clamp, Multiplier, QAdd, QConv, QGraph, QKernel, QLinear, QMap, QMapId,
    QParams, QPool, QStep, StepId,
};
