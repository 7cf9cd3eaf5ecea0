//! The protobuf codec of every service: prost's, except that a message
//! that does not parse is answered INVALID_ARGUMENT. gRPC's status table
//! lists INTERNAL for an unparsable request, but here the fault is the
//! sender's, and a rig must be told to fix its encoder, not wait for ours.

use std::marker::PhantomData;
use tonic::Status;
use tonic::codec::{BufferSettings, Codec, DecodeBuf, Decoder};
use tonic_prost::{ProstCodec, ProstDecoder, ProstEncoder};

/// prost's codec with a decoder that answers a malformed message with
/// INVALID_ARGUMENT (prost's own says INTERNAL).
pub struct StrictCodec<T, U> {
    inner: ProstCodec<T, U>,
}

impl<T, U> Default for StrictCodec<T, U> {
    fn default() -> Self {
        StrictCodec {
            inner: ProstCodec::default(),
        }
    }
}

impl<T, U> Codec for StrictCodec<T, U>
where
    T: prost::Message + Send + 'static,
    U: prost::Message + Default + Send + 'static,
{
    type Encode = T;
    type Decode = U;
    type Encoder = ProstEncoder<T>;
    type Decoder = StrictDecoder<U>;

    fn encoder(&mut self) -> Self::Encoder {
        self.inner.encoder()
    }

    fn decoder(&mut self) -> Self::Decoder {
        StrictDecoder {
            inner: self.inner.decoder(),
            _message: PhantomData,
        }
    }
}

/// The decoding half of [`StrictCodec`].
pub struct StrictDecoder<U> {
    inner: ProstDecoder<U>,
    _message: PhantomData<U>,
}

impl<U: prost::Message + Default> Decoder for StrictDecoder<U> {
    type Item = U;
    type Error = Status;

    fn decode(&mut self, buf: &mut DecodeBuf<'_>) -> Result<Option<U>, Status> {
        self.inner.decode(buf).map_err(|s| {
            Status::invalid_argument(format!("malformed protobuf message: {}", s.message()))
        })
    }

    fn buffer_settings(&self) -> BufferSettings {
        self.inner.buffer_settings()
    }
}
