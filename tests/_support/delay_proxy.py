"""A TCP proxy on a free loopback port that delays what the server sends back by `delay_s`: a
session store that answers late, in front of a real redis-server. Runs its own event loop in a
thread; the delay can be changed at any time (it applies to bytes read from then on)."""

from __future__ import annotations

import asyncio
import threading

from bench.harness.ports import free_port


class DelayProxy:
    def __init__(self, target_port: int) -> None:
        self.target_port = target_port
        self.port = free_port()
        self.delay_s = 0.0
        self._loop = asyncio.new_event_loop()
        self._ready = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self._server: asyncio.AbstractServer | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def __enter__(self) -> DelayProxy:
        self._thread.start()
        if not self._ready.wait(10):
            raise RuntimeError("the delay proxy did not start")
        return self

    def __exit__(self, *exc: object) -> None:
        self._loop.call_soon_threadsafe(self._loop.stop)
        self._thread.join(timeout=10)

    def _run(self) -> None:
        asyncio.set_event_loop(self._loop)
        self._server = self._loop.run_until_complete(asyncio.start_server(self._client, "127.0.0.1", self.port))
        self._ready.set()
        self._loop.run_forever()
        self._server.close()
        for task in asyncio.all_tasks(self._loop):
            task.cancel()
        self._loop.run_until_complete(asyncio.sleep(0))
        self._loop.close()

    async def _client(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        up_reader, up_writer = await asyncio.open_connection("127.0.0.1", self.target_port)

        async def pipe(src: asyncio.StreamReader, dst: asyncio.StreamWriter, delayed: bool) -> None:
            try:
                while data := await src.read(65536):
                    if delayed and self.delay_s > 0:
                        await asyncio.sleep(self.delay_s)
                    dst.write(data)
                    await dst.drain()
            except (ConnectionError, asyncio.CancelledError):
                pass
            finally:
                dst.close()

        await asyncio.gather(pipe(reader, up_writer, False), pipe(up_reader, writer, True))
