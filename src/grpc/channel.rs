//! `ChannelService`: channel definitions, timeline resets, operator SOC,
//! a cell's own OCV model (fitted in `ocv.rs`).

use super::convert::{channel_from_pb, channel_to_pb};
use super::status::{check_person, invalid};
use crate::ingest::Hub;
use crate::pb;
use std::sync::Arc;
use tonic::{Request, Response, Status};

/// Channels per ListChannels page at most: 1,000 × a 4 KiB description
/// stays well inside the 16 MiB message limit.
const MAX_CHANNELS_PER_PAGE: usize = 1000;

/// `ChannelService`: define channels and their rules, anchor SOC, reset a timeline.
pub struct ChannelApi {
    pub(super) hub: Arc<Hub>,
}

#[tonic::async_trait]
impl pb::channel_service_server::ChannelService for ChannelApi {
    async fn put_channel(
        &self,
        request: Request<pb::PutChannelRequest>,
    ) -> Result<Response<pb::PutChannelResponse>, Status> {
        let c = request
            .into_inner()
            .channel
            .ok_or_else(|| invalid("channel", "unset", "a channel definition is required"))?;
        let def = channel_from_pb(c, &self.hub.registry())?;
        let (run_id, new_run) = self.hub.put_channel(def.clone()).await?;
        tracing::info!(channel_id = %def.channel_id, run_id, new_run, "channel defined");
        Ok(Response::new(pb::PutChannelResponse {
            channel: Some(channel_to_pb(&def, run_id)),
            new_run,
        }))
    }

    async fn get_channel(
        &self,
        request: Request<pb::GetChannelRequest>,
    ) -> Result<Response<pb::GetChannelResponse>, Status> {
        let rt = self.hub.channel(&request.into_inner().channel_id)?;
        let g = rt.lock().expect("channel state poisoned");
        Ok(Response::new(pb::GetChannelResponse {
            channel: Some(channel_to_pb(&g.def, g.run_id)),
        }))
    }

    async fn list_channels(
        &self,
        request: Request<pb::ListChannelsRequest>,
    ) -> Result<Response<pb::ListChannelsResponse>, Status> {
        let q = request.into_inner();
        let page_size = match q.page_size {
            0 => MAX_CHANNELS_PER_PAGE,
            n => (n as usize).min(MAX_CHANNELS_PER_PAGE),
        };
        let (page, more) = self.hub.channel_page(&q.page_token, page_size);
        let channels: Vec<_> = page
            .iter()
            .map(|(def, run_id)| channel_to_pb(def, *run_id))
            .collect();
        let next_page_token = match (more, channels.last()) {
            (true, Some(last)) => last.channel_id.clone(),
            _ => String::new(),
        };
        Ok(Response::new(pb::ListChannelsResponse {
            channels,
            next_page_token,
        }))
    }

    async fn reset_timeline(
        &self,
        request: Request<pb::ResetTimelineRequest>,
    ) -> Result<Response<pb::ResetTimelineResponse>, Status> {
        let q = request.into_inner();
        let (seq, time_ns) = self.hub.reset_timeline(&q.channel_id, q.after_seq).await?;
        Ok(Response::new(pb::ResetTimelineResponse {
            last_stored_seq: seq,
            time_unix_ns: time_ns,
        }))
    }

    async fn set_channel_soc(
        &self,
        request: Request<pb::SetChannelSocRequest>,
    ) -> Result<Response<pb::SetChannelSocResponse>, Status> {
        let q = request.into_inner();
        check_person("set_by", &q.set_by, &q.note)?;
        let time_ns = self
            .hub
            .set_soc(&q.channel_id, q.soc, &q.set_by, &q.note)
            .await?;
        Ok(Response::new(pb::SetChannelSocResponse {
            soc: q.soc,
            time_unix_ns: time_ns,
        }))
    }

    async fn fit_ocv_model(
        &self,
        request: Request<pb::FitOcvModelRequest>,
    ) -> Result<Response<pb::FitOcvModelResponse>, Status> {
        let q = request.into_inner();
        let gathered = super::ocv::gather(&self.hub, &q.channel_id, q.run_id).await?;
        let fit = super::ocv::fit(&self.hub, &gathered, q.fit_capacity)?;
        Ok(Response::new(pb::FitOcvModelResponse {
            channel_id: q.channel_id,
            run_id: gathered.run_id as u64,
            fit: Some(fit),
        }))
    }

    async fn apply_ocv_fit(
        &self,
        request: Request<pb::ApplyOcvFitRequest>,
    ) -> Result<Response<pb::ApplyOcvFitResponse>, Status> {
        let q = request.into_inner();
        check_person("applied_by", &q.applied_by, &q.note)?;
        Ok(Response::new(super::ocv::apply(&self.hub, &q).await?))
    }
}
