//! Stopping: on a signal or a cancel request, ending or detaching from outstanding attempts;
//! inside an allocation, submitting the next job of the chain.

use super::*;

impl Engine<'_> {
    /// After the allocation's warning signal: submit the next job of the chain (the same
    /// script, after this job) when any point still has work.
    pub(super) async fn continue_allocation(&mut self) -> Result<Option<String>> {
        let Some(env) = self.opts.allocation.clone() else {
            return Ok(None);
        };
        if self.points.iter().all(|p| p.phase == PointPhase::Done) {
            return Ok(None);
        }
        let Some(script) = env.script.clone() else {
            return Ok(None);
        };
        let next = env.continuation + 1;
        let id = rondo_adapters::slurm::allocation::submit_continuation(
            "sbatch",
            &script,
            env.job_id.as_deref(),
            next,
            Duration::from_secs(60),
        )
        .await
        .map_err(|e| anyhow::anyhow!("cannot submit the continuation job: {e}"))?;
        let detail = format!(
            "allocation job {} ends; continuation {next} submitted as job {id}",
            env.job_id.as_deref().unwrap_or("?")
        );
        self.event("allocation-continued", None, None, None, &detail)
            .await?;
        self.progress.line(detail);
        Ok(Some(id))
    }

    /// Stop on a signal or a cancel request: end or detach from outstanding attempts and
    /// record what happened.
    pub(super) async fn stop_everything(
        &mut self,
        rx: &mut mpsc::UnboundedReceiver<Completion>,
        checked: &mut mpsc::UnboundedReceiver<Checked>,
        request: Option<&CancelRequest>,
    ) -> Result<()> {
        let cancelled = request.is_some();
        let why_text = match request {
            Some(r) => format!("cancelled: {}", r.reason),
            None => "signal received".to_string(),
        };
        let why = why_text.as_str();
        self.record_launches().await?;
        self.progress
            .line(format!("stopping: {why}; ending outstanding attempts"));
        let detail = match request {
            Some(r) => format!("rondo cancel: {} (asked by {} at {})", r.reason, r.by, r.at),
            None => why.to_string(),
        };
        self.event(
            if cancelled {
                "cancel"
            } else {
                "run-interrupted"
            },
            None,
            None,
            None,
            &detail,
        )
        .await?;
        self.stop_residents(why).await?;
        let batch = self.opts.executor.kind() != "local";
        if cancelled && batch {
            let ids: Vec<i64> = self
                .inflight
                .iter()
                .filter(|(_, f)| !f.on_host)
                .map(|(id, _)| *id)
                .collect();
            for id in ids {
                if let Err(e) = self.executor.cancel(id, why).await {
                    tracing::warn!(attempt = id, %e, "cancel failed");
                }
            }
        }
        let mode = if batch && !cancelled {
            Shutdown::Detach
        } else {
            Shutdown::Terminate {
                grace: self.opts.grace,
            }
        };
        self.executor
            .shutdown(mode)
            .await
            .map_err(|e| anyhow::anyhow!("shutting down the executor: {e}"))?;
        if let Some(local) = &self.on_host {
            // Children on this host never outlive a stop of rondo.
            local
                .shutdown(Shutdown::Terminate {
                    grace: self.opts.grace,
                })
                .await
                .map_err(|e| anyhow::anyhow!("shutting down the host executor: {e}"))?;
        }
        // Attempts whose outputs are being checked and stored ended by themselves: record
        // them as they ended (bounded local work, so no deadline).
        while !self.storing.is_empty() {
            match checked.recv().await {
                Some(c) => self.on_checked(c).await?,
                None => break,
            }
        }
        // Completions of the ended attempts (local: Cancelled by rondo).
        // Which ends are awaited: every one of local children; of batch jobs only when they
        // were cancelled (detached jobs run on).
        let awaited = |f: &InFlight| !batch || cancelled || f.on_host;
        let any_local = !batch || self.inflight.values().any(|f| f.on_host);
        let deadline =
            tokio::time::Instant::now() + Duration::from_secs(if any_local { 30 } else { 2 });
        while self.inflight.values().any(awaited) {
            match tokio::time::timeout_at(deadline, rx.recv()).await {
                Ok(Some(c)) => {
                    let id = c.attempt_id;
                    let Some(fl) = self.inflight.get(&id).cloned() else {
                        continue;
                    };
                    if let Some(u) = &c.usage {
                        self.usage.insert(id, u.clone());
                    }
                    let ended = Ended::Failed {
                        kind: "cancelled".into(),
                        message: why.to_string(),
                        exit_status: None,
                        started: c.started_at,
                        ended: c.ended_at,
                        host: c.host,
                        free: true,
                        state: AttemptState::Cancelled,
                    };
                    self.settle(id, Some(&fl), ended).await?;
                }
                _ => break,
            }
        }
        if cancelled {
            let active: Vec<String> = self
                .points
                .iter()
                .filter(|p| p.phase == PointPhase::Active)
                .map(|p| p.spec.id.clone())
                .collect();
            self.ledger
                .write(Failpoint::RunCancelled, |s| {
                    for id in &active {
                        s.point_state(id, PointState::Cancelled, Some(why));
                    }
                })
                .await?;
            let _ = std::fs::remove_file(&self.paths.cancel_request);
        }
        Ok(())
    }
}
