"""First-order check of the encoder tune's gradient (the check that found the unbalanced factors).

    python benchmarks/scans/encoder_gradient_check.py      (after encoder_tune_scan.py wrote $SCAN_DIR/c0.7)

Takes one batch of 32 sentences, the loss L and its gradient g over the trained tensors, and prints L(θ − εg)
against the first-order prediction L − ε‖g‖² for ε = 1e-4 … 1e-1, the batched against the sentence-by-sentence
loss, and the mean size of the first tensors and of their gradients. Committed as it was run; figures in
benchmarks/results/scans.md.
"""
import os
import torch
from attncompress import tune as T, loading
torch.set_num_threads(2)
calib = ["examples/calibration.txt", "corpus:pydoc-calibration"]
job = T._open_job(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/enc") + "/c0.7", calib, os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/enc") + "/tmpout", context=128, heldout=0.1,
                  eval_texts=None, eval_tokens=None, resume=False, force=True)
teacher = loading.load_model("builtin:minilm-l6" if False else T.find_teacher("builtin:minilm-l6", job.src, job.manifest)[0]).model
cache = T.SentenceTeacher(teacher, job.blocks, job.mask, False)
s = T.TuneSettings(steps=10, batch=32, context=128, lr=1e-4, seed=0, decay="none", decay_coef=0.0, penalty_every=1,
                   temperature=1.0, mix=0.0, topk=8, train_norms=False, train_dense=False, warmup=1, embed_loss="cos",
                   hidden_weight=0.0, heldout=0.1, eval_every=10, patience=3)
opt, trained = T._optimizer(job.model, s)
model = job.model
idx = torch.arange(32)
n = int(job.mask[idx].sum(1).max())
tg = cache.batch(idx, n)
x = job.blocks[idx, :n]
def L():
    return T.embedding_cosine_loss(model(x, attention_mask=tg.mask), x, tg, 1.0)
print("train mode", model.training)
l0 = L(); l0.backward()
g = [p.grad.clone() for _, p, _ in trained]
gn = sum(float(v.pow(2).sum()) for v in g)
print("loss", float(l0), "grad norm^2", gn, "n params", len(trained))
with torch.no_grad():
    for eps in [1e-4, 1e-3, 1e-2, 1e-1]:
        for (_, p, _), v in zip(trained, g): p.sub_(eps * v)
        l = float(L())
        print(eps, l, "pred", float(l0) - eps * gn)
        for (_, p, _), v in zip(trained, g): p.add_(eps * v)
# check also: same loss without batch vs per-sentence
with torch.no_grad():
    h = model(x, attention_mask=tg.mask)
    print("batched loss", float(T.embedding_cosine_loss(h, x, tg, 1.0)))
    per = []
    for i in range(32):
        m = int(tg.mask[i].sum())
        hi = model(x[i:i+1, :m])[0]
        per.append(float((torch.nn.functional.normalize(hi.mean(0), dim=-1) * tg.unit[i]).sum()))
    print("unbatched loss", 1 - sum(per) / 32)
for nme, p, tr in trained[:8]:
    print(nme, tuple(p.shape), float(p.abs().mean()), float(p.grad.abs().mean()))
