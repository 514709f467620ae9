"""TLS: a real `seawall serve` worker scores comments over rediss:// against a redis-server with a
TLS port, its certificate verified against a throw-away CA made in the test (redis_tls_ca)."""
from __future__ import annotations

import pytest
import redis

from faults_kit import KEYS, comment_text, verdict_ids, write_model
from kit import Worker, stop_all, wait_until
from tlscerts import make_ca
from worker.connection import connect

pytestmark = pytest.mark.redis_server


@pytest.mark.slow
def test_worker_processes_comments_over_tls_with_the_certificate_verified(redis_factory, tmp_path):
    certs = make_ca(tmp_path / "pki")
    server = redis_factory("tls", tls={"ca": certs["ca"], "cert": certs["cert"], "key": certs["key"]})
    assert server.url.startswith("rediss://")
    admin = connect(server.url, tls_ca=certs["ca"], raw_streams=False)
    model = write_model(tmp_path / "model.bin")
    good = Worker(url=server.url, name="tls-w", log_dir=tmp_path, model_path=model,
                  env={"SEAWALL_REDIS_TLS_CA": certs["ca"], "SEAWALL_RETRAIN_FEEDBACK_IN_SERVE": "1"})
    # Same server, but the worker trusts another CA: the certificate check must refuse the server.
    wrong = Worker(url=server.url, name="wrong-ca", log_dir=tmp_path, model_path=model,
                   env={"SEAWALL_REDIS_TLS_CA": certs["other_ca"]})
    try:
        good.start()
        wrong.start()
        for i in range(30):
            admin.xadd(KEYS.comments, {"id": f"c{i}", "text": comment_text(i)})
        assert wait_until(lambda: len(verdict_ids(admin)) == 30, timeout=60), good.output()[-3000:]
        admin.xadd(KEYS.feedback, {"id": "c1", "label": "spam", "moderator": "mod-a"})  # joins the cached text
        assert wait_until(lambda: admin.xlen(KEYS.key("labels")) == 1, timeout=30), good.output()[-3000:]
        assert wait_until(lambda: "certificate verify failed" in wrong.output(), timeout=30), wrong.output()[-2000:]
        assert wrong.alive()  # it keeps retrying with backoff, as for any unreachable server
        consumers = {c["name"] for c in admin.xinfo_consumers(KEYS.comments, KEYS.group)}
    finally:
        codes = stop_all([good, wrong])
    assert codes == [0, 0]
    assert consumers == {b"tls-w"}
    assert set(verdict_ids(admin)) == {f"c{i}" for i in range(30)}
    assert "Traceback" not in good.output()
    # Plain TCP is off on a TLS-only server: the same port does not speak unencrypted Redis.
    with pytest.raises(redis.ConnectionError):
        redis.Redis(host="127.0.0.1", port=server.port, socket_timeout=2).ping()
