"""The layer kit (lcodec/training/kit) and the heddle runtime (lcodec/models/heddle.py):
tables of the runtime equal the torch integer pass bit for bit, for every op; parallel
pass == step pass across threads and batch shapes; the audit catches a broken mask and
names the pair; export -> load -> pack/unpack round trips."""
import numpy as np
import pytest

torch = pytest.importorskip("torch")

from lcodec.models import heddle_audit, load_model  # noqa: E402
from lcodec.models.heddle import Graph, Heddle  # noqa: E402
from lcodec.training import kit  # noqa: E402
from support import markov_chain  # noqa: E402


def made(P=12, A=5, E=3, hidden=24, residual=True, seed=0):
    """A small masked autoencoder over P positions (natural order)."""
    torch.manual_seed(seed)
    din, dh = kit.mask_degrees(P, hidden)
    l1 = kit.DegreeLinear(kit.grid_degrees(din, E), dh)
    layers = [l1]
    if residual:
        layers.append(kit.Residual(kit.DegreeLinear(dh, dh)))
    layers.append(kit.DegreeLinear(dh, din.repeat_interleave(A), act="logits", strict=True))
    return kit.HeddleNet((1, P), A, kit.SymbolEmbed(A, E), layers)


def convnet(record=(5, 6), A=7, C=6, seed=0):
    """A small masked-convolution model: centre excluded, then included, a residual block."""
    torch.manual_seed(seed)
    return kit.HeddleNet(record, A, kit.SymbolEmbed(A, 3), [
        kit.RasterConv(3, C, (2, 3), include_centre=False),
        kit.Residual(kit.RasterConv(C, C, (2, 3), include_centre=True)),
        kit.RasterConv(C, A, (1, 1), include_centre=True, act="logits")])


def window_net(W=16, A=256, seed=0):
    """A causal byte model: embeddings of the 4 previous bytes, a 1-D conv, logits."""
    torch.manual_seed(seed)
    return kit.HeddleNet((1, W), A, kit.SymbolEmbed(A, 4, kit.causal_window(4)), [
        kit.RasterConv(16, 12, (1, 3), include_centre=True),
        kit.RasterConv(12, A, (1, 1), act="logits")])


def warm(net, x, steps=3):
    """A few training steps so the activation scales are set."""
    opt = torch.optim.Adam(net.parameters(), 1e-2)
    net.train()
    for _ in range(steps):
        opt.zero_grad()
        kit.nll(net, x).backward()
        opt.step()
    net.eval()


NETS = {"made": (made, (1, 12), 5), "conv": (convnet, (5, 6), 7), "window": (window_net, (1, 16), 256)}


@pytest.mark.parametrize("name", list(NETS))
def test_runtime_equals_torch_integer_pass(name):
    make, (H, W), A = NETS[name]
    net = make()
    rng = np.random.default_rng(1)
    x = torch.from_numpy(rng.integers(0, A, (20, H, W)))
    warm(net, x)
    params, arrays = kit.graph_of(net)
    ref = kit.integer_tables(params, arrays, x).numpy()
    g = Graph(params, arrays)
    got = g.parallel(x.reshape(20, -1).numpy(), width=A).reshape(20, H, W, A)
    assert np.array_equal(got, ref)
    # the step pass, in one batch and with another batch shape
    step = heddle_audit.step_tables(g, x.reshape(20, -1).numpy(), H, W)
    assert np.array_equal(step.reshape(got.shape), got)
    assert all(heddle_audit.thread_check(g, x.reshape(20, -1).numpy(), H, W).values())


@pytest.mark.parametrize("name", list(NETS))
def test_integer_nll_close_to_float(name):
    make, (H, W), A = NETS[name]
    net = make()
    rng = np.random.default_rng(2)
    # a learnable source: each symbol repeats the previous one most of the time
    x = rng.integers(0, A, (64, H * W))
    for p in range(1, H * W):
        keep = rng.random(64) < 0.7
        x[keep, p] = x[keep, p - 1]
    x = torch.from_numpy(x.reshape(64, H, W))
    warm(net, x, steps=60)
    rep = kit.audit(net, x, speed=False, echo=lambda *a: None)
    assert rep["ok"]
    assert abs(rep["integer_gap"]) < 0.02


def test_audit_names_a_broken_mask():
    net = made(residual=False)
    with torch.no_grad():  # open one forbidden connection: position 3's logits see input 3
        net.layers[-1].mask[3 * 5:4 * 5, :] = 1
        net.layers[0].mask[:, :] = 1
    x = torch.from_numpy(np.random.default_rng(0).integers(0, 5, (8, 1, 12)))
    warm(net, x)
    lines = []
    rep = kit.audit(net, x, speed=False, echo=lines.append)
    assert not rep["ok"] and rep["float_pairs"] and rep["causal_pairs"]
    assert (3, 3) in rep["causal_pairs"] and (3, 3) in rep["float_pairs"]
    assert "3<-3" in lines[0]
    params, arrays = kit.graph_of(net)
    with pytest.raises(ValueError, match="not autoregressive"):
        Graph(params, arrays)


def test_conv_mask_types():
    a = kit.RasterConv(1, 1, (2, 3), include_centre=False).mask[0, 0]
    b = kit.RasterConv(1, 1, (2, 3), include_centre=True).mask[0, 0]
    assert a.tolist() == [[1, 1, 1], [1, 0, 0]]
    assert b.tolist() == [[1, 1, 1], [1, 1, 0]]
    with pytest.raises(ValueError, match="2\\*\\*24"):
        kit.RasterConv(200, 8, (3, 5))


def test_mask_degrees_other_order():
    din, dh = kit.mask_degrees(4, 6, order=[2, 0, 3, 1])
    assert din.tolist() == [2, 4, 1, 3]
    assert dh.min() >= 1 and dh.max() <= 3


def test_export_load_pack_unpack(tmp_path):
    import lcodec

    net = made(P=16, A=17, E=4, hidden=32)
    rng = np.random.default_rng(3)
    x = torch.from_numpy(rng.integers(0, 17, (40, 1, 16)))
    warm(net, x)
    path = str(tmp_path / "m.lcmodel")
    kit.export(net, path)
    m = load_model(path)
    assert isinstance(m.inner, Heddle)
    data = rng.integers(0, 17, 16 * 37).astype(np.uint8).tobytes() + b"\xff\x00tail"
    blob = lcodec.pack(data, model=path)
    assert lcodec.unpack(blob, model=path) == data


def test_a_kit_model_codes_a_markov_source_at_its_entropy_rate(tmp_path):
    """Outside reference: the entropy rate of a stationary Markov chain,
    H = -sum_i mu_i sum_j P_ij log2 P_ij (Cover and Thomas, Elements of Information Theory,
    ch. 4; recalled from memory). A kit model (the previous symbol embedded, a 1x1
    convolution to logits), trained briefly, codes a long sample within 1% of H."""
    import lcodec

    A = 4
    Pm, rate, x = markov_chain(11, A)
    n = len(x)
    torch.manual_seed(0)
    net = kit.HeddleNet((1, 4096), A, kit.SymbolEmbed(A, 4, kit.causal_window(1)), [
        kit.RasterConv(4, 16, (1, 1)), kit.RasterConv(16, A, (1, 1), act="logits")])
    seqs = torch.from_numpy(x.reshape(-1, 1, 4096))
    opt = torch.optim.Adam(net.parameters(), 3e-2)
    for i in range(300):
        net.train()
        if i == 200:
            opt.param_groups[0]["lr"] = 5e-3
        opt.zero_grad()
        kit.nll(net, seqs[i % 4::4]).backward()
        opt.step()
    path = str(tmp_path / "markov.lcmodel")
    kit.export(net, path)
    data = x.astype(np.uint8).tobytes()
    blob = lcodec.pack(data, model=path)
    assert lcodec.unpack(blob, model=path) == data
    from lcodec.format import container as C

    bits = 8 * sum(f.coded_len for f in C.read_container(blob).frames) / n  # the coded words
    assert abs(bits / rate - 1) < 0.01, (bits, rate)


def test_jobs_and_threads_give_the_same_archive(tmp_path):
    import lcodec

    net = made(P=16, A=17, E=4, hidden=32)
    rng = np.random.default_rng(4)
    warm(net, torch.from_numpy(rng.integers(0, 17, (40, 1, 16))))
    path = str(tmp_path / "m.lcmodel")
    kit.export(net, path)
    data = rng.integers(0, 17, 16 * 700).astype(np.uint8).tobytes()
    one = lcodec.pack(data, model=path, frame_size=2048)
    assert lcodec.pack(data, model=path, frame_size=2048, jobs=2) == one
    assert lcodec.unpack(one, model=path, jobs=2) == data
    assert lcodec.unpack(one, model=path, workers=2) == data


def test_another_coding_order(tmp_path):
    """A masked autoencoder over another order: export puts the graph in coding order, the records are
    laid out in that order (kit.to_coding_order), and everything agrees."""
    import lcodec

    P, A, E = 12, 5, 3
    order = list(np.random.default_rng(0).permutation(P))
    torch.manual_seed(0)
    din, dh = kit.mask_degrees(P, 24, order)
    net = kit.HeddleNet((3, 4), A, kit.SymbolEmbed(A, E), [
        kit.DegreeLinear(kit.grid_degrees(din, E), dh), kit.Residual(kit.DegreeLinear(dh, dh)),
        kit.DegreeLinear(dh, din.repeat_interleave(A), act="logits", strict=True)], order=order)
    rng = np.random.default_rng(1)
    x = rng.integers(0, A, (64, P))
    x[:, order[1:]] = x[:, order[:-1]]  # each symbol repeats the one coded before it
    x = torch.from_numpy(x.reshape(64, 3, 4))
    warm(net, x, steps=60)
    rep = kit.audit(net, x, speed=False, echo=lambda *a: None)
    assert rep["ok"] and abs(rep["integer_gap"]) < 0.02
    path = str(tmp_path / "o.lcmodel")
    kit.export(net, path)
    data = kit.to_coding_order(x, order).numpy().astype(np.uint8).tobytes()
    blob = lcodec.pack(data, model=path)
    assert lcodec.unpack(blob, model=path) == data
    assert kit.from_coding_order(kit.to_coding_order(x, order), order).tolist() == x.reshape(64, -1).tolist()
    # a conv model cannot take another order
    with pytest.raises(ValueError, match="another coding order"):
        kit.HeddleNet((1, 4), A, kit.SymbolEmbed(A, 2), [kit.RasterConv(2, A, (1, 3), act="logits")],
                      order=[3, 2, 1, 0])
