//! Links are byte streams: serial, TCP and in-memory are interchangeable
//! below the SCPI session. This file holds the in-memory link, which hands
//! each complete line to a responder (the simulated instruments) and
//! queues its reply for reading, with no task switch.

use std::collections::VecDeque;
use std::io;
use std::pin::Pin;
use std::sync::{Arc, Mutex};
use std::task::{Context, Poll, Waker};
use tokio::io::{AsyncRead, AsyncWrite, ReadBuf};

/// Any duplex byte stream a session can run over.
pub trait ByteStream: AsyncRead + AsyncWrite + Send + Unpin {}
impl<T: AsyncRead + AsyncWrite + Send + Unpin> ByteStream for T {}

/// A boxed link.
pub type Link = Box<dyn ByteStream>;

/// Something that answers program messages line by line (an instrument).
pub trait LineResponder: Send {
    /// Handle one message (without its terminator). Returns the response
    /// message (without terminator) if the message held queries, or
    /// `None`. `Err` means the link should drop (a simulated disconnect).
    fn respond(&mut self, line: &str) -> Result<Option<String>, io::Error>;
}

/// An in-memory link to a responder.
pub struct InMemoryLink {
    responder: Arc<Mutex<dyn LineResponder>>,
    incoming: Vec<u8>,
    outgoing: VecDeque<u8>,
    reader: Option<Waker>,
    closed: bool,
}

impl InMemoryLink {
    pub fn new(responder: Arc<Mutex<dyn LineResponder>>) -> InMemoryLink {
        InMemoryLink {
            responder,
            incoming: Vec::new(),
            outgoing: VecDeque::new(),
            reader: None,
            closed: false,
        }
    }
}

impl AsyncWrite for InMemoryLink {
    fn poll_write(
        mut self: Pin<&mut Self>,
        _cx: &mut Context<'_>,
        buf: &[u8],
    ) -> Poll<io::Result<usize>> {
        if self.closed {
            return Poll::Ready(Err(io::Error::new(
                io::ErrorKind::BrokenPipe,
                "in-memory link closed",
            )));
        }
        self.incoming.extend_from_slice(buf);
        while let Some(pos) = self.incoming.iter().position(|&b| b == b'\n') {
            let line: Vec<u8> = self.incoming.drain(..=pos).collect();
            let text = String::from_utf8_lossy(&line[..line.len() - 1]).into_owned();
            let answer = {
                let mut r = match self.responder.lock() {
                    Ok(g) => g,
                    Err(p) => p.into_inner(),
                };
                r.respond(text.trim_end_matches('\r'))
            };
            match answer {
                Ok(Some(reply)) => {
                    self.outgoing.extend(reply.as_bytes());
                    self.outgoing.push_back(b'\n');
                    if let Some(w) = self.reader.take() {
                        w.wake();
                    }
                }
                Ok(None) => {}
                Err(e) => {
                    self.closed = true;
                    if let Some(w) = self.reader.take() {
                        w.wake();
                    }
                    return Poll::Ready(Err(e));
                }
            }
        }
        Poll::Ready(Ok(buf.len()))
    }

    fn poll_flush(self: Pin<&mut Self>, _cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        Poll::Ready(Ok(()))
    }

    fn poll_shutdown(mut self: Pin<&mut Self>, _cx: &mut Context<'_>) -> Poll<io::Result<()>> {
        self.closed = true;
        Poll::Ready(Ok(()))
    }
}

impl AsyncRead for InMemoryLink {
    fn poll_read(
        mut self: Pin<&mut Self>,
        cx: &mut Context<'_>,
        buf: &mut ReadBuf<'_>,
    ) -> Poll<io::Result<()>> {
        if self.outgoing.is_empty() {
            if self.closed {
                return Poll::Ready(Ok(()));
            }
            self.reader = Some(cx.waker().clone());
            return Poll::Pending;
        }
        let n = buf.remaining().min(self.outgoing.len());
        let (a, b) = self.outgoing.as_slices();
        let from_a = n.min(a.len());
        buf.put_slice(&a[..from_a]);
        if n > from_a {
            buf.put_slice(&b[..n - from_a]);
        }
        self.outgoing.drain(..n);
        Poll::Ready(Ok(()))
    }
}
