"""``seawall train / evaluate / score`` through ops.cli.main: results and every bad input."""
from __future__ import annotations

import io
import json

import numpy as np
import pytest

from ops.cli import main

from test_network import HAM, SPAM


def write_jsonl(path, records):
    path.write_text("".join((r if isinstance(r, str) else json.dumps(r)) + "\n" for r in records), encoding="utf-8")
    return path


def examples(repeat=6):
    out = []
    for i in range(repeat):
        for j, t in enumerate(SPAM):
            out.append({"text": f"{t} {i}", "label": "spam", "id": f"s{i}-{j}", "site": "forum.example"})
        for j, t in enumerate(HAM):
            out.append({"text": f"{t} {i}", "label": "ham", "id": f"h{i}-{j}"})
    return out


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    return tmp_path_factory.mktemp("cli")


@pytest.fixture(scope="module")
def data(workdir):
    return write_jsonl(workdir / "train.jsonl", examples())


@pytest.fixture(scope="module")
def model_file(workdir, data):
    path = workdir / "model.npz"
    assert main(["train", str(data), "--out", str(path), "--dim", "4", "--min-df", "1", "--epochs", "8", "--quiet"]) == 0
    return path


def one_error_line(capsys, command: str) -> str:
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"seawall {command}: error: ")
    assert "Traceback" not in err
    return lines[0]


def test_train_shows_progress_and_a_summary(tmp_path, data, capsys):
    out_file = tmp_path / "m.npz"
    code = main(["train", str(data), "--out", str(out_file), "--dim", "3", "--epochs", "3", "--seed", "2",
                 "--buckets", "4096", "--min-df", "1"])
    assert code == 0
    captured = capsys.readouterr()
    epochs = [line for line in captured.err.splitlines() if line.startswith("epoch ")]
    assert epochs and epochs[0].startswith("epoch 1/3") and "loss" in epochs[0] and "val_auc" in epochs[0]
    assert "trained on" in captured.out and "d=3" in captured.out and "version" in captured.out
    with np.load(out_file, allow_pickle=False) as npz:
        manifest = json.loads(npz["manifest"].tobytes())
    assert manifest["dim"] == 3 and manifest["hashing"]["n_buckets"] == 4096


def test_train_reads_several_files(tmp_path, capsys):
    a = write_jsonl(tmp_path / "a.jsonl", [r for r in examples() if r["label"] == "spam"])
    b = write_jsonl(tmp_path / "b.jsonl", [r for r in examples() if r["label"] == "ham"])
    assert main(["train", str(a), str(b), "--out", str(tmp_path / "m.npz"), "--dim", "2", "--quiet", "--min-df", "1"]) == 0
    assert "24 spam, 24 ham in all" in capsys.readouterr().out


def test_evaluate_json_has_the_figures(model_file, data, capsys):
    assert main(["evaluate", "--model", str(model_file), str(data), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    for key in ("roc_auc", "average_precision", "recall_at_1pct_fpr", "recall_at_0_1pct_fpr", "n"):
        assert key in report
    assert report["n"] == len(examples())
    assert report["roc_auc"] > 0.9
    assert set(report["hold"]["confusion_matrix"]) == {"tn", "fp", "fn", "tp"}


def test_evaluate_text_report(model_file, data, capsys):
    assert main(["evaluate", "--model", str(model_file), str(data)]) == 0
    out = capsys.readouterr().out
    assert "roc_auc" in out and "at hold" in out and "at reject" in out


def test_score_arguments_print_score_action_and_tokens(model_file, capsys):
    assert main(["score", "--model", str(model_file), "claim your free prize now", "the garden meeting notes"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == 2
    spam_score, spam_action, spam_tokens = lines[0].split("\t")
    ham_score, ham_action, _ = lines[1].split("\t")
    assert float(spam_score) > float(ham_score)
    assert spam_action in ("hold", "reject") and ham_action == "publish"
    assert "free" in spam_tokens or "prize" in spam_tokens


def test_score_json_from_stdin_lines_and_jsonl(model_file, capsys, monkeypatch):
    stdin = io.StringIO('free prize click here\n\n{"id": "c7", "text": "thanks for the notes"}\n')
    monkeypatch.setattr("sys.stdin", stdin)
    assert main(["score", "--model", str(model_file), "--json", "--top", "2"]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.strip().splitlines()]
    assert len(rows) == 2
    assert rows[1]["id"] == "c7" and "id" not in rows[0]
    assert rows[0]["action"] in ("publish", "hold", "reject") and len(rows[0]["reasons"]) <= 2
    assert rows[0]["score"] > rows[1]["score"]


def test_score_threshold_overrides(model_file, capsys):
    assert main(["score", "--model", str(model_file), "--hold", "0.0", "--reject", "1.0", "the garden meeting"]) == 0
    assert capsys.readouterr().out.split("\t")[1] == "hold"


BAD_LINES = {
    "malformed-json": ('{"text": "free prize", "label": "spam"', ":2: malformed JSON"),
    "missing-label": ('{"text": "free prize"}', ':2: missing "label"'),
    "unknown-label": ('{"text": "free prize", "label": "junk"}', ":2: unknown label 'junk'"),
    "missing-text": ('{"label": "spam"}', ':2: "text" is missing'),
    "text-not-string": ('{"text": 5, "label": "spam"}', ':2: "text" is a int'),
    "not-an-object": ('["free prize", "spam"]', ":2: expected a JSON object"),
}


@pytest.mark.parametrize("command", ["train", "evaluate"])
@pytest.mark.parametrize("case", sorted(BAD_LINES), ids=sorted(BAD_LINES))
def test_bad_line_names_file_and_line(tmp_path, model_file, capsys, command, case):
    line, expected = BAD_LINES[case]
    path = write_jsonl(tmp_path / "bad.jsonl", [{"text": "hello there", "label": "ham"}, line])
    argv = ["train", str(path), "--out", str(tmp_path / "m.npz")] if command == "train" else \
        ["evaluate", "--model", str(model_file), str(path)]
    assert main(argv) == 2
    message = one_error_line(capsys, command)
    assert f"{path}{expected}" in message
    assert not (tmp_path / "m.npz").exists()


def test_invalid_utf8_names_the_line(tmp_path, capsys):
    path = tmp_path / "latin.jsonl"
    path.write_bytes(b'{"text": "ok", "label": "ham"}\n{"text": "caf\xe9", "label": "ham"}\n')
    assert main(["train", str(path), "--out", str(tmp_path / "m.npz")]) == 2
    assert f"{path}:2: not valid UTF-8" in one_error_line(capsys, "train")


@pytest.mark.parametrize(
    "records, expected",
    [
        ([], "no examples"),
        (["", "   "], "no examples"),
        ([{"text": "a", "label": "spam"}, {"text": "b", "label": "spam"}], "all 2 examples are spam"),
        ([{"text": "a", "label": "ham"}], "all 1 examples are ham"),
    ],
    ids=["empty-file", "blank-lines", "only-spam", "only-ham"],
)
@pytest.mark.parametrize("command", ["train", "evaluate"])
def test_empty_or_single_class_data(tmp_path, model_file, capsys, records, expected, command):
    path = write_jsonl(tmp_path / "d.jsonl", records)
    argv = ["train", str(path), "--out", str(tmp_path / "m.npz")] if command == "train" else \
        ["evaluate", "--model", str(model_file), str(path)]
    assert main(argv) == 2
    message = one_error_line(capsys, command)
    assert expected in message and str(path) in message


@pytest.mark.parametrize("command", ["train", "evaluate"])
def test_missing_data_file(tmp_path, model_file, capsys, command):
    missing = tmp_path / "nope.jsonl"
    argv = ["train", str(missing), "--out", str(tmp_path / "m.npz")] if command == "train" else \
        ["evaluate", "--model", str(model_file), str(missing)]
    assert main(argv) == 2
    assert f"{missing}: no such file" in one_error_line(capsys, command)


def corrupt_bytes(blob: bytes) -> bytes:
    return b"garbage" + blob[7:]


def truncated(blob: bytes) -> bytes:
    return blob[: len(blob) // 3]


def tampered(blob: bytes) -> bytes:
    with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
        arrays = {k: npz[k] for k in npz.files}
    arrays["head_w2"] = arrays["head_w2"] + np.float32(0.5)
    out = io.BytesIO()
    np.savez_compressed(out, **arrays)
    return out.getvalue()


@pytest.mark.parametrize(
    "damage, expected",
    [(corrupt_bytes, "not a model file"), (truncated, "truncated"), (tampered, "checksum mismatch")],
    ids=["corrupt", "truncated", "tampered"],
)
@pytest.mark.parametrize("command", ["evaluate", "score"])
def test_bad_model_file(tmp_path, model_file, data, capsys, damage, expected, command):
    bad = tmp_path / "bad.npz"
    bad.write_bytes(damage(model_file.read_bytes()))
    argv = ["evaluate", "--model", str(bad), str(data)] if command == "evaluate" else \
        ["score", "--model", str(bad), "hello"]
    assert main(argv) == 2
    assert expected in one_error_line(capsys, command)


def test_missing_model_file(tmp_path, capsys):
    assert main(["score", "--model", str(tmp_path / "none.npz"), "hello"]) == 2
    assert "cannot read" in one_error_line(capsys, "score")


def test_score_stdin_malformed_json_line(model_file, capsys, monkeypatch):
    monkeypatch.setattr("sys.stdin", io.StringIO('fine text\n{"text": \n'))
    assert main(["score", "--model", str(model_file)]) == 2
    assert "stdin:2: malformed JSON" in one_error_line(capsys, "score")


def test_bad_threshold_override_is_a_user_error(model_file, capsys):
    assert main(["score", "--model", str(model_file), "--hold", "0.9", "--reject", "0.2", "x"]) == 2
    assert "must not exceed" in one_error_line(capsys, "score")


def test_bad_buckets_is_a_user_error(tmp_path, data, capsys):
    assert main(["train", str(data), "--out", str(tmp_path / "m.npz"), "--buckets", "1000"]) == 2
    assert "buckets must be a power of two" in one_error_line(capsys, "train")


def test_score_batches_of_stdin_give_the_same_rows_as_one_call_each(model_file, capsys, monkeypatch):
    # More lines than one batch, JSON and plain text mixed in the first batch
    # only: the batch paths (one orjson call, line by line) agree with scoring
    # each comment alone.
    import ops.commands.score as score_command

    monkeypatch.setattr(score_command, "CHUNK", 4)
    texts = ["claim your free prize now", "the garden meeting notes", "free casino spins", "thanks for the notes",
             "see you at the meeting", "win a prize today"]
    lines = ["plain " + texts[0]] + [json.dumps({"id": f"c{i}", "text": t}) for i, t in enumerate(texts[1:], 1)]
    monkeypatch.setattr("sys.stdin", io.StringIO("\n".join(lines) + "\n"))
    assert main(["score", "--model", str(model_file), "--json"]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [r.get("id") for r in rows] == [None, "c1", "c2", "c3", "c4", "c5"]
    from model.classifier import EmbeddingClassifier

    clf = EmbeddingClassifier.load(model_file)
    for row, text in zip(rows, ["plain " + texts[0]] + texts[1:]):
        scores, reasons = clf.score_many([text], top_k=5)
        assert row["score"] == pytest.approx(float(scores[0]), abs=1e-6)
        assert [tuple(r) for r in row["reasons"]] == [(t, pytest.approx(c, abs=1e-9)) for t, c in reasons[0]]


@pytest.mark.parametrize("lines, expected", [
    (['{"text": "a"}', '{"text": "b"}', '{"text": 5}'], "stdin:7: a JSON line needs a string \"text\" field"),
    (['{"text": "a"}', '{"id": 1}', '{"text": "c"}'], "stdin:6: a JSON line needs a string \"text\" field"),
    (['{"text": "a"}', '{"text": null}', '{"text": "c"}'], "stdin:6: a JSON line needs a string \"text\" field"),
    (['{"text": "a"}', '{"text": "b"', '{"text": "c"}'], "stdin:6: malformed JSON"),
    (['{"text": "a"}', '{"text": "b"}, {"text": "b2"}', '{"text": "c"}'], "stdin:6: malformed JSON"),
], ids=["text-not-string", "no-text", "null-text", "malformed", "two-objects-on-a-line"])
def test_score_names_the_bad_line_in_a_later_batch(model_file, capsys, monkeypatch, lines, expected):
    import ops.commands.score as score_command

    monkeypatch.setattr(score_command, "CHUNK", 4)
    good = ['{"text": "fine"}'] * 4  # the first batch is fine and is printed
    monkeypatch.setattr("sys.stdin", io.StringIO("\n".join(good + lines) + "\n"))
    assert main(["score", "--model", str(model_file), "--json"]) == 2
    assert expected in one_error_line(capsys, "score")


def test_score_line_that_is_not_utf8(model_file, capsys, monkeypatch):
    class BinaryStdin(io.StringIO):
        buffer = io.BytesIO(b"fine\n\xff\xfe broken\n")

    monkeypatch.setattr("sys.stdin", BinaryStdin())
    assert main(["score", "--model", str(model_file)]) == 2
    assert "stdin:2: the line is not UTF-8 text" in one_error_line(capsys, "score")


def test_score_imports_neither_scikit_learn_nor_scipy(model_file, tmp_path):
    import subprocess
    import sys

    probe = ("import sys\nfrom ops.cli import main\n"
             f"main(['score', '--model', {str(model_file)!r}, '--json', 'free prize now'])\n"
             "print(sorted({m.split('.')[0] for m in sys.modules} & {'sklearn', 'scipy'}), file=sys.stderr)\n")
    done = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    assert done.stderr.strip().splitlines()[-1] == "[]"
    assert json.loads(done.stdout)["action"] in ("publish", "hold", "reject")


def test_train_prints_what_the_size_budget_chose(tmp_path, data, capsys):
    out_file = tmp_path / "m.npz"
    assert main(["train", str(data), "--out", str(out_file), "--quiet", "--max-bytes", "200000"]) == 0
    line = next(x for x in capsys.readouterr().out.splitlines() if x.startswith("size budget"))
    assert line.startswith("size budget 200,000 bytes: d=") and "min_df=" in line and "4th-root rule" in line
    assert out_file.stat().st_size <= 200_000
    assert main(["train", str(data), "--out", str(out_file), "--quiet", "--max-bytes", "none"]) == 0
    assert "size budget: none" in capsys.readouterr().out


def test_train_that_cannot_fit_the_budget_says_what_to_change(tmp_path, data, capsys):
    assert main(["train", str(data), "--out", str(tmp_path / "m.npz"), "--quiet", "--max-bytes", "3000"]) == 2
    assert "raise max_bytes (seawall train --max-bytes)" in one_error_line(capsys, "train")
    assert not (tmp_path / "m.npz").exists()


@pytest.mark.parametrize("argv, expected", [
    (["--max-bytes", "lots"], "--max-bytes: must be a positive number of bytes or 'none'"),
    (["--min-df", "0"], "--min-df: must be 'auto' or a positive integer"),
], ids=["max-bytes-not-a-number", "min-df-zero"])
def test_train_rejects_bad_budget_arguments(tmp_path, data, capsys, argv, expected):
    with pytest.raises(SystemExit) as exit_:
        main(["train", str(data), "--out", str(tmp_path / "m.npz"), "--quiet", *argv])
    assert exit_.value.code == 2 and expected in capsys.readouterr().err
