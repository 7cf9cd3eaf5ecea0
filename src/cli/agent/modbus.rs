//! A Modbus TCP device (cyclers, BMS boards, PLCs): each quantity is a
//! holding or input register of a unit, read as u16, i16, u32, i32 or f32
//! (two registers, high word first or low word first), then scaled and
//! offset. The connection is opened again after any failure.

use super::{Quantity, UsageError};
use std::time::Duration;
use tokio_modbus::Slave;
use tokio_modbus::client::{Context, Reader};

/// How a register holds its value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum RegType {
    U16,
    I16,
    U32,
    I32,
    F32,
}

/// One quantity's register.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Reg {
    pub address: u16,
    pub ty: RegType,
    /// For two-register types: the first register holds the high word.
    pub high_word_first: bool,
    /// Input register (function 0x04) instead of holding (0x03).
    pub input: bool,
    /// Raw value × scale + offset, in the quantity's unit.
    pub scale: f64,
    pub offset: f64,
}

impl Reg {
    pub(super) fn of(q: &Quantity, at: &str) -> Result<Reg, UsageError> {
        let address = q
            .register
            .ok_or_else(|| UsageError(format!("{at}.register: required for a modbus source")))?;
        let ty = match q.r#type.as_deref().unwrap_or("u16") {
            "u16" => RegType::U16,
            "i16" => RegType::I16,
            "u32" => RegType::U32,
            "i32" => RegType::I32,
            "f32" => RegType::F32,
            other => {
                return Err(UsageError(format!(
                    "{at}.type = {other:?}: expected u16, i16, u32, i32 or f32"
                )));
            }
        };
        let high_word_first = match q.word_order.as_deref().unwrap_or("high_first") {
            "high_first" => true,
            "low_first" => false,
            other => {
                return Err(UsageError(format!(
                    "{at}.word_order = {other:?}: expected high_first or low_first"
                )));
            }
        };
        let input = match q.table.as_deref().unwrap_or("holding") {
            "holding" => false,
            "input" => true,
            other => {
                return Err(UsageError(format!(
                    "{at}.table = {other:?}: expected holding or input"
                )));
            }
        };
        Ok(Reg {
            address,
            ty,
            high_word_first,
            input,
            scale: q.scale.unwrap_or(1.0),
            offset: q.offset.unwrap_or(0.0),
        })
    }

    fn count(&self) -> u16 {
        match self.ty {
            RegType::U16 | RegType::I16 => 1,
            _ => 2,
        }
    }
}

/// The value the registers hold, before scaling.
pub(crate) fn decode(words: &[u16], ty: RegType, high_word_first: bool) -> Option<f64> {
    let pair = || -> Option<u32> {
        let (a, b) = (*words.first()?, *words.get(1)?);
        let (hi, lo) = if high_word_first { (a, b) } else { (b, a) };
        Some((u32::from(hi) << 16) | u32::from(lo))
    };
    Some(match ty {
        RegType::U16 => f64::from(*words.first()?),
        RegType::I16 => f64::from(*words.first()? as i16),
        RegType::U32 => f64::from(pair()?),
        RegType::I32 => f64::from(pair()? as i32),
        RegType::F32 => f64::from(f32::from_bits(pair()?)),
    })
}

/// One device connection.
pub(crate) struct Device {
    address: String,
    unit_id: u8,
    timeout: Duration,
    ctx: Option<Context>,
}

impl Device {
    pub(crate) fn new(address: String, unit_id: u8, timeout: Duration) -> Device {
        Device {
            address,
            unit_id,
            timeout,
            ctx: None,
        }
    }

    pub(crate) fn connected(&self) -> bool {
        self.ctx.is_some()
    }

    /// One register's value, scaled; the unit's factor comes after.
    pub(crate) async fn read(&mut self, reg: &Reg) -> Result<f64, String> {
        if self.ctx.is_none() {
            let addr = tokio::net::lookup_host(&self.address)
                .await
                .map_err(|e| format!("{}: {e}", self.address))?
                .next()
                .ok_or_else(|| format!("{}: no address", self.address))?;
            let connect = tokio_modbus::client::tcp::connect_slave(addr, Slave(self.unit_id));
            let ctx = tokio::time::timeout(self.timeout, connect)
                .await
                .map_err(|_| format!("connect {}: timed out", self.address))?
                .map_err(|e| format!("connect {}: {e}", self.address))?;
            self.ctx = Some(ctx);
        }
        // Connected to this unit above: every request goes to it.
        let ctx = self.ctx.as_mut().expect("connected above");
        let request = async {
            if reg.input {
                ctx.read_input_registers(reg.address, reg.count()).await
            } else {
                ctx.read_holding_registers(reg.address, reg.count()).await
            }
        };
        let words = match tokio::time::timeout(self.timeout, request).await {
            Ok(Ok(Ok(words))) => words,
            Ok(Ok(Err(exception))) => {
                return Err(format!(
                    "register {}: device answered {exception}",
                    reg.address
                ));
            }
            Ok(Err(e)) => {
                self.ctx = None;
                return Err(format!("register {}: {e}", reg.address));
            }
            Err(_) => {
                self.ctx = None;
                return Err(format!(
                    "register {}: no answer within {} ms",
                    reg.address,
                    self.timeout.as_millis()
                ));
            }
        };
        decode(&words, reg.ty, reg.high_word_first)
            .map(|raw| raw * reg.scale + reg.offset)
            .ok_or_else(|| format!("register {}: {} words came back", reg.address, words.len()))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_type_and_word_order() {
        assert_eq!(decode(&[0xFFFF], RegType::U16, true), Some(65535.0));
        assert_eq!(decode(&[0xFFFF], RegType::I16, true), Some(-1.0));
        assert_eq!(decode(&[0x8000], RegType::I16, true), Some(-32768.0));
        // 0x0001_86A0 = 100,000.
        assert_eq!(
            decode(&[0x0001, 0x86A0], RegType::U32, true),
            Some(100_000.0)
        );
        assert_eq!(
            decode(&[0x86A0, 0x0001], RegType::U32, false),
            Some(100_000.0)
        );
        // −2,500 = 0xFFFF_F63C.
        assert_eq!(decode(&[0xFFFF, 0xF63C], RegType::I32, true), Some(-2500.0));
        assert_eq!(
            decode(&[0xF63C, 0xFFFF], RegType::I32, false),
            Some(-2500.0)
        );
        // IEEE 754 single: 1.3125 = 0x3FA8_0000 (from the format's definition).
        assert_eq!(decode(&[0x3FA8, 0x0000], RegType::F32, true), Some(1.3125));
        assert_eq!(decode(&[0x0000, 0x3FA8], RegType::F32, false), Some(1.3125));
        assert_eq!(decode(&[0x3FA8], RegType::F32, true), None);
    }
}
