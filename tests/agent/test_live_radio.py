"""
Live radio checks, opt-in: ``pytest --ble-adapter=hci0 tests/agent/test_live_radio.py``.

They need a real adapter, BlueZ and some BLE devices advertising nearby, and they run in real time
(the radio is the one part no clock can fake). Everywhere else the radio edge is a fake; these are
what an installer runs on a freshly built board before it goes on the wall.
"""

from __future__ import annotations

import asyncio
import re
import statistics

from listenpost.agent.sources.bleak_scan import BleakSource
from listenpost.core.clock import SystemClock

SCAN_S = 20.0


async def _scan(source, seconds: float) -> list:
    heard = []

    async def collect() -> None:
        async for advert in source.adverts():
            heard.append(advert)

    task = asyncio.create_task(collect())
    try:
        await asyncio.wait_for(asyncio.shield(task), seconds)
    except TimeoutError:
        pass
    finally:
        task.cancel()
        await asyncio.gather(task, return_exceptions=True)
    return heard


async def test_bleak_scanning_delivers_adverts_and_reports_rates(ble_adapter: str) -> None:
    """Through BlueZ the adapter hears something within 20 s, with sane fields; the effective rate is printed."""
    source = BleakSource(ble_adapter, SystemClock(), stall_seconds=SCAN_S)
    heard = await _scan(source, SCAN_S)
    assert heard, f"{ble_adapter}: no advertisements in {SCAN_S} s (is anything advertising nearby?)"
    for a in heard:
        assert re.fullmatch(r"[0-9A-F]{2}(:[0-9A-F]{2}){5}", a.address)
        assert -127 < a.rssi_dbm <= 20  # Core Spec Vol 4 Part E §7.7.65.2 range; -127 is dropped as "no RSSI"
    rates = source.effective_rates()
    print(
        f"\n{ble_adapter}: {len(heard)} adverts from {len({a.address for a in heard})} addresses in {SCAN_S} s; "
        f"median per-address rate {statistics.median(rates.values()) if rates else 0:.2f} Hz "
        "(BlueZ may deliver far fewer than the devices send: see docs/radio.md §2 on DuplicateData)"
    )
    assert source.stats()["state"] in ("scanning", "restarting")
