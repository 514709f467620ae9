"""Partitions of the comment stream: the two formulas producers follow, and the key names they give."""
import pytest

from worker.partitions import MAX_PARTITIONS, SLOTS, key_slot, partition_of, partition_tag
from worker.settings import Keys, PartitionedKeyError


# MurmurHash3 x86 32-bit test vectors, seed 0: the empty input hashes to 0 (SMHasher's reference code);
# the pangram's value 0x2e4ff723 is the one quoted in the MurmurHash article's table of examples (from memory,
# and computed again here by the reference implementation mmh3 wraps).
@pytest.mark.parametrize("text, hashed", [("", 0x00000000),
                                          ("The quick brown fox jumps over the lazy dog", 0x2E4FF723)],
                         ids=["empty", "pangram"])
def test_partition_formula_is_murmur3_mod_k(text, hashed):
    for k in (2, 3, 7, 16, MAX_PARTITIONS):
        assert partition_of(text, k) == hashed % k
        assert partition_of(text.encode(), k) == hashed % k


def test_one_partition_takes_every_comment():
    assert {partition_of(f"c-{i}", 1) for i in range(100)} == {0}


def test_partitions_spread_ids_evenly():
    counts = [0] * 8
    for i in range(16_000):
        counts[partition_of(f"comment-{i}", 8)] += 1
    assert min(counts) > 1_800 and max(counts) < 2_200, counts


# The Redis Cluster specification's CRC16 (XMODEM) check value: "123456789" -> 0x31C3, hence slot 12739;
# and its hash-tag example: {user1000}.following and {user1000}.followers share a slot.
def test_key_slot_follows_the_cluster_specification():
    assert key_slot("123456789") == 0x31C3 % SLOTS == 12739
    assert key_slot("{user1000}.following") == key_slot("{user1000}.followers") == key_slot("user1000")


@pytest.mark.parametrize("k", [2, 3, 6, 16, 64, MAX_PARTITIONS])
def test_each_partition_tag_lies_in_its_own_run_of_slots(k):
    for p in range(k):
        slot = key_slot(partition_tag(p, k))
        assert p * SLOTS // k <= slot < (p + 1) * SLOTS // k


def test_partition_tag_rejects_bad_arguments():
    with pytest.raises(ValueError, match="partition must be in"):
        partition_tag(3, 3)
    with pytest.raises(ValueError, match="partitions must be an integer"):
        partition_tag(0, MAX_PARTITIONS + 1)


def test_one_partition_keeps_the_single_stream_names():
    keys = Keys()
    part = keys.part(0)
    assert (keys.comments, keys.verdicts, keys.held, keys.deadletter) == (
        "seawall:comments", "seawall:verdicts", "seawall:held", "seawall:deadletter")
    assert (part.comments, part.text("c-1"), part.done("c-1"), part.rates(7)) == (
        "seawall:comments", "seawall:text:c-1", "seawall:done:c-1", "seawall:rates:7")
    assert keys.text("c-1") == "seawall:text:c-1" and keys.done("c-1") == "seawall:done:c-1"
    assert keys.parts == (part,)


def test_every_key_of_a_partition_shares_its_slot():
    keys = Keys(partitions=6)
    for part in keys.parts:
        names = [part.comments, part.verdicts, part.held, part.deadletter, part.lease, part.rates(29_000_000),
                 part.text("x"), part.done("x")]
        assert {key_slot(n) for n in names} == {key_slot(part.tag)}
        assert all(n.startswith("seawall:{") for n in names)  # the prefix stays leading, for ACL key patterns


def test_id_keys_find_their_partition():
    keys = Keys(partitions=4)
    for i in range(50):
        cid = f"c-{i}"
        part = keys.part(partition_of(cid, 4))
        assert keys.text(cid) == part.text(cid) and keys.done(cid) == part.done(cid)
        assert keys.part_of(cid) is part


def test_whole_deployment_names_refuse_to_stand_for_one_partition():
    keys = Keys(partitions=2)
    for name in ("comments", "verdicts", "held", "deadletter"):
        with pytest.raises(PartitionedKeyError, match=rf"Keys\.{name}: .*2 partitions"):
            getattr(keys, name)
    with pytest.raises(PartitionedKeyError, match="Keys.rates"):
        keys.rates(1)
    # Keys outside the partitions share one hash tag when K > 1 (one slot for the control plane's
    # multi-key operations) and keep their names with K = 1.
    assert keys.feedback == "seawall:{shared}:feedback" and keys.events == "seawall:{shared}:events"
    assert Keys().feedback == "seawall:feedback" and Keys().models_active == "seawall:models:active"


def test_keys_check_partitions_and_prefix():
    with pytest.raises(ValueError, match="Keys: partitions must be an integer"):
        Keys(partitions=0)
    with pytest.raises(ValueError, match="hash tag"):
        Keys(prefix="{seawall}:", partitions=3)
    assert Keys(prefix="{seawall}:").comments == "{seawall}:comments"  # one partition may keep a tagged prefix
    with pytest.raises(ValueError, match=r"Keys.part: partition must be in \[0, 2\)"):
        Keys(partitions=2).part(2)
