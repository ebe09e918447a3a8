"""The shell's long-running parts (servers, clients) as async context managers."""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import Self


class Started(ABC):
    """A part with ``start()`` and ``stop()``; ``async with part:`` starts it and always stops
    it, also when the block raises."""

    @abstractmethod
    async def start(self) -> None: ...

    @abstractmethod
    async def stop(self) -> None: ...

    async def __aenter__(self) -> Self:
        await self.start()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.stop()
