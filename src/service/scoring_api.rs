//! The `plumbline.v1.Scoring` gRPC service: thin handlers that take the
//! message, call the [`Engine`], and map errors in [`super::status`].

use std::pin::Pin;
use std::sync::Arc;

use tokio::sync::mpsc;
use tokio_stream::Stream;
use tokio_stream::wrappers::ReceiverStream;
use tonic::{Request, Response, Status, Streaming};

use super::access::caller_of;
use super::engine::{AsyncSend, Engine, StreamEnd};
use super::status::to_status;
use crate::pb;
use crate::pb::scoring_server::Scoring;

pub struct ScoringApi {
    engine: Arc<Engine>,
}

impl ScoringApi {
    pub fn new(engine: Arc<Engine>) -> ScoringApi {
        ScoringApi { engine }
    }
}

struct ChannelSend(mpsc::Sender<Result<pb::ScoreResponse, Status>>);

impl AsyncSend for ChannelSend {
    async fn send(&mut self, response: pb::ScoreResponse) -> bool {
        self.0.send(Ok(response)).await.is_ok()
    }
}

type ResponseStream = Pin<Box<dyn Stream<Item = Result<pb::ScoreResponse, Status>> + Send>>;

#[tonic::async_trait]
impl Scoring for ScoringApi {
    async fn score(
        &self,
        request: Request<pb::ScoreRequest>,
    ) -> Result<Response<pb::ScoreResponse>, Status> {
        let who = caller_of(&request);
        let answer = self.engine.score(request.into_inner(), &who).await?;
        Ok(Response::new(answer))
    }

    type ScoreStreamStream = ResponseStream;

    async fn score_stream(
        &self,
        request: Request<Streaming<pb::ScoreRequest>>,
    ) -> Result<Response<Self::ScoreStreamStream>, Status> {
        let who = caller_of(&request);
        let inbound = request.into_inner();
        // Two answers in flight let scoring the next chunk overlap sending
        // the last one without buffering a long screen in memory.
        let (tx, rx) = mpsc::channel(2);
        let engine = self.engine.clone();
        tokio::spawn(async move {
            let errors = tx.clone();
            let ended = engine.score_stream(inbound, &who, ChannelSend(tx)).await;
            let status = match ended {
                Ok(()) => return,
                // Reading the client's messages failed; the size limit's
                // status already names its setting.
                Err(StreamEnd::Inbound(status)) => status,
                Err(StreamEnd::Failed(e)) => to_status(&e),
            };
            let _ = errors.send(Err(status)).await;
        });
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }

    async fn describe_model(
        &self,
        request: Request<pb::DescribeModelRequest>,
    ) -> Result<Response<pb::ModelCard>, Status> {
        Ok(Response::new(
            self.engine.describe(&request.get_ref().model)?,
        ))
    }

    async fn list_models(
        &self,
        _request: Request<pb::ListModelsRequest>,
    ) -> Result<Response<pb::ListModelsResponse>, Status> {
        Ok(Response::new(self.engine.list()))
    }
}
