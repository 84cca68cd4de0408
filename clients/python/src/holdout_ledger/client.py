"""The client: one gRPC channel to the daemon, a bearer token, and typed calls."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Iterator, List, Optional, Sequence, Tuple, Union

import grpc

from . import inputs
from .errors import BudgetRefused, HoldoutError, InvalidInput, Unreachable, from_rpc_error
from .types import (
    Answer,
    Declaration,
    Duplicate,
    HistoryEntry,
    HoldoutInfo,
    Leaderboard,
    Proof,
    Quote,
    Ranking,
    Refusal,
    SealedEntry,
    Status,
    Target,
    Validation,
    _answer,
    _bounds,
    _in_units,
    _duplicates,
    _history_entry,
    _holdout_info,
    _leaderboard,
    _quote,
    _ranking,
    _refusal,
    _sealed,
    _status,
    _target,
)

from ._proto.holdout.v1 import holdouts_pb2 as _h  # generated at install time
from ._proto.holdout.v1 import holdouts_pb2_grpc as _hg
from ._proto.holdout.v1 import ledger_pb2 as _l
from ._proto.holdout.v1 import ledger_pb2_grpc as _lg
from ._proto.holdout.v1 import submissions_pb2 as _s
from ._proto.holdout.v1 import submissions_pb2_grpc as _sg
from ._proto.holdout.v1 import types_pb2 as _t
from ._proto.holdout.v1 import users_pb2 as _u
from ._proto.holdout.v1 import users_pb2_grpc as _ug

#: Address used when neither ``server`` nor $HOLDOUT_SERVER is given (the daemon's default).
DEFAULT_SERVER = "127.0.0.1:7361"
#: Rows per streamed chunk (the Rust client uses the same).
CHUNK_ROWS = 8192
_MAX_REPLY_BYTES = 256 << 20
_MAX_REQUEST_BYTES = 64 << 20


def connect(
    server: Optional[str] = None,
    token: Optional[str] = None,
    *,
    root_certificates: Union[bytes, str, Path, None] = None,
    connect_timeout: float = 5.0,
    timeout: Optional[float] = None,
) -> "Client":
    """Connects to a holdout-ledger daemon and returns a :class:`Client`.

    Args:
        server: ``HOST:PORT``, ``http://HOST:PORT`` or ``https://HOST:PORT``; default
            $HOLDOUT_SERVER, else ``127.0.0.1:7361``.
        token: bearer token (from ``holdout init --token-out`` or ``holdout user add``); default
            $HOLDOUT_TOKEN.
        root_certificates: PEM bytes (or a path to a PEM file) of the CA that signed the
            daemon's certificate, for ``https://`` servers; None uses the system roots.
        connect_timeout: seconds to wait for the connection before raising :class:`Unreachable`;
            the connection is made eagerly so an unreachable daemon is reported at once.
        timeout: deadline in seconds for each call (None: no deadline).

    Raises:
        Unreachable: nothing answers at ``server`` within ``connect_timeout``.
        InvalidInput: ``token`` holds characters a header cannot carry.
    """
    server = server or os.environ.get("HOLDOUT_SERVER") or DEFAULT_SERVER
    if token is None:
        token = os.environ.get("HOLDOUT_TOKEN")
    token = (token or "").strip() or None
    if token is not None and (not token.isascii() or any(c in token for c in "\r\n")):
        raise InvalidInput("the token holds characters a header cannot carry")
    tls = server.startswith("https://")
    target = server.split("://", 1)[1] if "://" in server else server
    target = target.rstrip("/")
    options = [
        ("grpc.max_receive_message_length", _MAX_REPLY_BYTES),
        ("grpc.max_send_message_length", _MAX_REQUEST_BYTES),
    ]
    if tls:
        roots = root_certificates
        if isinstance(roots, (str, Path)):
            roots = Path(roots).read_bytes()
        channel = grpc.secure_channel(
            target, grpc.ssl_channel_credentials(root_certificates=roots), options=options
        )
    else:
        channel = grpc.insecure_channel(target, options=options)
    try:
        grpc.channel_ready_future(channel).result(timeout=connect_timeout)
    except grpc.FutureTimeoutError:
        channel.close()
        raise Unreachable(f"cannot reach the daemon at {server} (waited {connect_timeout} s)") from None
    return Client(channel, token, server=server, timeout=timeout)


class Client:
    """A connection to the daemon. Use :func:`connect` to make one; close it with
    :meth:`close` or a ``with`` block.

    Every call raises the exceptions of :mod:`holdout_ledger.errors`: :class:`InvalidInput`,
    :class:`NotAuthorized`, :class:`NotFound`, :class:`Unreachable`, :class:`StateConflict`,
    and :class:`BudgetRefused` when a submission is refused.

    Predictions may be a pandas DataFrame (id column + prediction column), a Series indexed by
    row id, a dict, or a numpy array / list with ``ids`` (see :mod:`holdout_ledger.inputs`).
    """

    def __init__(self, channel: grpc.Channel, token: Optional[str], *, server: str = "",
                 timeout: Optional[float] = None):
        self.server = server
        self._channel = channel
        self._metadata = (("authorization", f"Bearer {token}"),) if token else ()
        self._timeout = timeout
        self._holdouts = _hg.HoldoutsStub(channel)
        self._submissions = _sg.SubmissionsStub(channel)
        self._users = _ug.UsersStub(channel)
        self._ledger = _lg.LedgerStub(channel)

    # -- plumbing ---------------------------------------------------------------------------

    def close(self) -> None:
        """Closes the channel."""
        self._channel.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"<holdout_ledger.Client server={self.server!r}>"

    def _unary(self, method, request):
        try:
            return method(request, metadata=self._metadata, timeout=self._timeout)
        except grpc.RpcError as e:
            raise from_rpc_error(e, self.server) from None

    def _stream(self, method, request) -> list:
        try:
            return list(method(request, metadata=self._metadata, timeout=self._timeout))
        except grpc.RpcError as e:
            raise from_rpc_error(e, self.server) from None

    # -- reads ------------------------------------------------------------------------------

    def whoami(self) -> dict:
        """Who the token belongs to: ``{"name", "roles", "team"}``."""
        u = self._unary(self._users.WhoAmI, _u.WhoAmIRequest())
        return {"name": u.name, "roles": list(u.roles), "team": u.team}

    def holdout(self, name: str) -> HoldoutInfo:
        """Public facts of one holdout (policy, targets, rows, budget, guarantee)."""
        return _holdout_info(self._unary(self._holdouts.GetHoldout, _h.GetHoldoutRequest(name=name)))

    def holdouts(self, include_closed: bool = False) -> List[HoldoutInfo]:
        """Every holdout visible to the caller."""
        r = self._unary(
            self._holdouts.ListHoldouts, _h.ListHoldoutsRequest(include_closed=include_closed)
        )
        return [_holdout_info(m) for m in r.holdouts]

    def declaration(self, name: str) -> Declaration:
        """The public declaration: targets with their label domains, and the row ids in order."""
        targets: List[Target] = []
        ids: List[str] = []
        for chunk in self._stream(self._holdouts.GetDeclaration, _h.GetDeclarationRequest(name=name)):
            targets.extend(_target(t) for t in chunk.targets)
            ids.extend(chunk.ids)
        return Declaration(targets=tuple(targets), ids=tuple(ids))

    def ids(self, name: str) -> List[str]:
        """The holdout's row ids, in its declared order (the order of a predictions array
        passed without ``ids``)."""
        return list(self.declaration(name).ids)

    def status(self, holdout: str) -> Status:
        """Budget position of a holdout as the caller may see it: spent, remaining, answered,
        refused, next half-width, queries left, and the guarantee sentence; heavy-probing flags;
        for a sealed round its entries per team, each team's selected entry and the declared
        teams without an entry (``Status.round``)."""
        return _status(self._unary(self._submissions.GetStatus, _s.StatusRequest(holdout=holdout)))

    def history(self, holdout: str, exact: bool = False) -> List[HistoryEntry]:
        """Released answers and refusals, oldest first.

        ``exact=True`` adds the exact mean losses (``HistoryEntry.exact_scores``) for roles
        allowed to read them (auditor; organizer once the holdout is closed); every such read is
        itself recorded in the ledger.
        """
        req = _s.HistoryRequest(holdout=holdout, exact=exact)
        entries = [_history_entry(m) for m in self._stream(self._submissions.History, req)]
        bounds = self._bounds(holdout)
        return [_in_units(e, bounds) for e in entries]

    def leaderboard(self, holdout: str) -> Leaderboard:
        """Each team's best, ranked: on a ``ladder:ETA`` holdout the team's shown best with its
        interval; under every other rule the best per team, each team's released answer with
        the lowest upper limit per target (a sealed round's only after its close). Only the
        caller's row when the board is for organizers only."""
        req = _s.LeaderboardRequest(holdout=holdout)
        board = _leaderboard(self._unary(self._submissions.Leaderboard, req))
        return _in_units(board, self._bounds(holdout))

    def ranking(self, holdout: str) -> Ranking:
        """The ranking of a closed sealed round with the paired comparisons between neighbours.

        Raises:
            StateConflict: the round has not closed (nothing about its entries is released).
        """
        req = _s.RankingRequest(holdout=holdout)
        ranking = _ranking(self._unary(self._submissions.Ranking, req))
        return _in_units(ranking, self._bounds(holdout))

    def _bounds(self, holdout: str) -> dict:
        """The bounds of the holdout's regression targets, for the ``units`` fields (empty
        when the holdout cannot be read: the call that needs them says why)."""
        try:
            return _bounds(self.holdout(holdout).targets)
        except HoldoutError:
            return {}

    def duplicates(self, holdout: str) -> Tuple[Duplicate, ...]:
        """Prediction digests submitted by more than one team (organizers and auditors)."""
        req = _s.DuplicatesRequest(holdout=holdout)
        return _duplicates(self._unary(self._submissions.Duplicates, req))

    # -- submissions ------------------------------------------------------------------------

    def validate(self, holdout: str, predictions: Any, ids: Optional[Sequence[Any]] = None, *,
                 target: Optional[str] = None, id_column: str = "id",
                 prediction_column: str = "prediction") -> Validation:
        """Checks predictions against the holdout's public declaration (row ids, classes).
        Nothing is scored, charged or recorded.

        Raises:
            InvalidInput: naming the first bad row id or value.
        """
        out = self._send(holdout, [predictions], [ids], target, id_column, prediction_column,
                         mode=_s.SUBMIT_MODE_VALIDATE)
        if out.WhichOneof("outcome") != "validation":
            raise HoldoutError(f"unexpected reply to a validation: {out.WhichOneof('outcome')}")
        return Validation(rows=out.validation.rows, digest=out.validation.digest)

    def dry_run(self, holdout: str, predictions: Any = None, ids: Optional[Sequence[Any]] = None,
                *, target: Optional[str] = None, id_column: str = "id",
                prediction_column: str = "prediction", max_cost: Optional[float] = None,
                models: int = 1) -> Quote:
        """Quotes what a submission would cost: query number, ``delta_i``, level in nats,
        half-width at the public reference score, worst-case code length, and
        ``would_refuse`` (the refusal reason, or ``""``). Nothing is scored, charged or recorded.

        ``predictions`` may be omitted: the quote depends only on public facts, so the holdout's
        declared ids with a placeholder value are sent (a valid class, or 0.5).
        """
        return self._quote(holdout, predictions, ids, target, id_column, prediction_column,
                           max_cost, models)

    def _quote(self, holdout, predictions, ids, target, id_column, prediction_column, max_cost,
               models) -> Quote:
        t = self._target(holdout, target)
        if predictions is None:
            decl_ids = self.ids(holdout)
            filler = (t.classes[0] if t.classes else "0") if t.uses_classes else 0.5
            predictions, ids = [filler] * len(decl_ids), decl_ids
        out = self._send(holdout, [predictions] * max(1, models), [ids] * max(1, models),
                         target, id_column, prediction_column, mode=_s.SUBMIT_MODE_DRY_RUN,
                         max_cost=max_cost, resolved=t)
        kind = out.WhichOneof("outcome")
        if kind == "quote":
            return _quote(out.quote)
        if kind == "refusal":
            raise BudgetRefused(_refusal(out.refusal))
        raise HoldoutError(f"unexpected reply to a dry run: {kind}")

    def submit(self, holdout: str, predictions: Any, ids: Optional[Sequence[Any]] = None, *,
               target: Optional[str] = None, id_column: str = "id",
               prediction_column: str = "prediction", note: str = "", request_id: str = "",
               max_cost: Optional[float] = None, raise_on_refusal: bool = True,
               final: bool = False) -> Union[Answer, Refusal, SealedEntry]:
        """Submits predictions for scoring: one answer, charged against the holdout's budget;
        on a sealed round a sealed entry (:class:`SealedEntry`, nothing about its score until
        the close).

        Args:
            holdout: holdout name.
            predictions: DataFrame / Series / dict / array / list (see the class docstring).
            ids: row ids for an array or list (default: the holdout's declared order).
            target: target name; may be left out when the holdout has one target.
            note: free text recorded with the query.
            request_id: your id for this submission: a retry with the same id and the same
                predictions returns the original answer (``replayed=True``) without a second
                charge; the same id with other predictions raises :class:`StateConflict`.
            max_cost: refuse (charging and recording nothing) if the answer's worst-case code
                would exceed this many nats.
            raise_on_refusal: when False a refusal is returned as a :class:`Refusal` instead
                of raised.
            final: on a sealed round, mark this entry as the team's selected entry (the one
                the close ranks; without any mark the team's latest entry is ranked).

        Returns:
            The :class:`Answer` (symbol, score, interval, level, budget, receipt, guarantee),
            or on a sealed round the :class:`SealedEntry`.

        Raises:
            BudgetRefused: the daemon refused (budget spent, tolerance, quota, closed,
                max-cost); nothing was charged.
            InvalidInput: bad ids or values; nothing was charged or recorded.
        """
        if max_cost is not None and not (max_cost > 0 and max_cost != float("inf")):
            raise InvalidInput(f"max_cost must be a positive number of nats, got {max_cost}")
        out = self._send(holdout, [predictions], [ids], target, id_column, prediction_column,
                         mode=_s.SUBMIT_MODE_ANSWER, note=note, request_id=request_id,
                         max_cost=max_cost, mark_final=final)
        return _in_units(self._answer_or_refusal(out, raise_on_refusal), self._bounds(holdout))

    def submit_batch(self, holdout: str, predictions: Sequence[Any],
                     model_names: Optional[Sequence[str]] = None, *,
                     ids: Optional[Sequence[Any]] = None, target: Optional[str] = None,
                     id_column: str = "id", prediction_column: str = "prediction",
                     note: str = "", request_id: str = "", max_cost: Optional[float] = None,
                     raise_on_refusal: bool = True) -> Union[Answer, Refusal]:
        """Submits several models' predictions as one best-of batch (rule ``best-of``): the
        answer names the best model (``best_model``, an index into ``predictions``) and its
        rounded score; one schedule share is charged per model."""
        preds = list(predictions)
        if not preds:
            raise InvalidInput("a batch needs at least one model's predictions")
        names = list(model_names) if model_names is not None else [f"model-{i}" for i in range(len(preds))]
        if len(names) != len(preds):
            raise InvalidInput(f"{len(names)} model names for {len(preds)} models")
        out = self._send(holdout, preds, [ids] * len(preds), target, id_column,
                         prediction_column, mode=_s.SUBMIT_MODE_ANSWER, note=note,
                         request_id=request_id, max_cost=max_cost, model_names=names)
        return self._answer_or_refusal(out, raise_on_refusal)

    @staticmethod
    def _answer_or_refusal(out, raise_on_refusal: bool) -> Union[Answer, Refusal, SealedEntry]:
        kind = out.WhichOneof("outcome")
        if kind == "answer":
            return _answer(out.answer)
        if kind == "sealed":
            return _sealed(out.sealed)
        if kind == "refusal":
            refusal = _refusal(out.refusal)
            if raise_on_refusal:
                raise BudgetRefused(refusal)
            return refusal
        raise HoldoutError(f"unexpected reply to a submission: {kind}")

    def _target(self, holdout: str, wanted: Optional[str]) -> Target:
        info = self.holdout(holdout)
        if wanted is not None:
            for t in info.targets:
                if t.name == wanted:
                    return t
            from .errors import NotFound

            raise NotFound(
                f"target {wanted} (holdout {holdout} has: {', '.join(t.name for t in info.targets)})"
            )
        if len(info.targets) == 1:
            return info.targets[0]
        raise InvalidInput(
            f"holdout {holdout} has several targets "
            f"({', '.join(t.name for t in info.targets)}); choose one with target="
        )

    def _send(self, holdout, predictions_list, ids_list, target, id_column, prediction_column, *,
              mode, note="", request_id="", max_cost=None, model_names=None, resolved=None,
              mark_final=False):
        t = resolved or self._target(holdout, target)
        cache: List[List[str]] = []

        def declared() -> List[str]:
            if not cache:
                cache.append(self.ids(holdout))
            return cache[0]

        models = []
        for preds, ids in zip(predictions_list, ids_list):
            row_ids, values = inputs.split_predictions(
                preds, ids, id_column, prediction_column, declared
            )
            if t.uses_classes:
                models.append((row_ids, inputs.encode_classes(row_ids, values, t), True))
            else:
                models.append((row_ids, inputs.encode_numbers(row_ids, values, t), False))
        header = _s.SubmitHeader(
            holdout=holdout,
            target=t.name,
            mode=mode,
            request_id=request_id,
            note=note,
            max_cost_nats=float(max_cost or 0.0),
            models=len(models),
            model_names=list(model_names or ["python"] * len(models)),
            expected_rows=len(models[0][0]),
            mark_final=mark_final,
        )

        def chunks() -> Iterator[Any]:
            yield _s.SubmitChunk(header=header)
            for m, (row_ids, vals, classes) in enumerate(models):
                for k in range(0, len(row_ids), CHUNK_ROWS):
                    piece = dict(model=m, ids=row_ids[k:k + CHUNK_ROWS])
                    if classes:
                        piece["classes"] = vals[k:k + CHUNK_ROWS]
                    else:
                        piece["values"] = vals[k:k + CHUNK_ROWS]
                    yield _s.SubmitChunk(predictions=_s.PredictionChunk(**piece))

        return self._unary(self._submissions.Submit, chunks())

    # -- custodian --------------------------------------------------------------------------

    def create_holdout(self, name: str, labels: Any, ids: Optional[Sequence[Any]] = None, *,
                       metric: str = "error", method: str = "", classes: Optional[Sequence[str]] = None,
                       target: str = "label", id_column: str = "id", label_column: str = "label",
                       delta: float = 0.05, schedule: str = "series", answers: str = "rounded:0.01",
                       tolerance: float = 0.05, sharing: str = "shared",
                       tolerance_reference: str = "worst-case", shares: str = "none",
                       daily_quota: int = 0, description: str = "",
                       family: str = "", family_delta: Optional[float] = None) -> HoldoutInfo:
        """Creates a single-target holdout from labels (custodian role).

        ``labels`` takes the same forms as predictions (a DataFrame with ``id_column`` and
        ``label_column``, a Series indexed by id, a dict, or values with ``ids``). For metric
        ``error``, ``classes`` is required: the label domain is public, so it is declared, never
        read from the labels (which would publish, say, that a rare class is absent); every
        label must be one of them. ``family`` joins (or, with ``family_delta``, founds) a family
        of row-disjoint holdouts sharing one total delta, ``delta`` being this holdout's share.
        The policy arguments are those of ``holdout create`` (see ``holdout create --help``);
        they are fixed for the holdout's lifetime and written to its genesis ledger entry.
        """
        if metric.split(":", 1)[0] == "error" and not classes:
            raise InvalidInput(
                f"target {target} (metric error) needs its declared classes: pass classes=[...] "
                "(the label domain is public, so it is stated, never read from the labels); "
                "nothing was sent")
        if family_delta is not None and not family:
            raise InvalidInput("family_delta was given without family=")
        row_ids, values = inputs.split_predictions(
            labels, ids, id_column, label_column,
            lambda: (_ for _ in ()).throw(InvalidInput("labels given as values need ids=")),
        )
        texts = [inputs.id_text(v) if not isinstance(v, float) or v.is_integer() else repr(v)
                 for v in values]
        spec = _h.HoldoutSpec(
            name=name,
            description=description,
            policy=_t.Policy(
                delta=delta, schedule=schedule, answers=answers, tolerance=tolerance,
                sharing=sharing, tolerance_reference=tolerance_reference, shares=shares,
                daily_quota=daily_quota,
            ),
            targets=[_t.Target(name=target, column=label_column, metric=metric, method=method,
                               classes=list(classes or []))],
            family=family,
            family_delta=family_delta or 0.0,
        )

        def chunks():
            yield _h.CreateHoldoutChunk(spec=spec)
            for k in range(0, len(row_ids), CHUNK_ROWS):
                yield _h.CreateHoldoutChunk(rows=_h.LabelRows(
                    ids=row_ids[k:k + CHUNK_ROWS],
                    columns=[_h.LabelColumn(values=texts[k:k + CHUNK_ROWS])],
                ))

        return _holdout_info(self._unary(self._holdouts.CreateHoldout, chunks()))

    def prove(self, holdout: str, entry_hash: Optional[str] = None, *,
              since: int = 0) -> Proof:
        """The newest signed checkpoint of a holdout's ledger, with proofs to keep beside it.

        ``entry_hash`` (a receipt's): an inclusion proof that the entry is in the signed tree.
        ``since`` (the tree size of a checkpoint you kept): a consistency proof that the new
        tree extends that one. The reply holds hashes, sizes and indices only; verify it
        offline with :mod:`holdout_ledger.verify` (``verify_receipt``, ``verify_checkpoints``)
        and the daemon's verifier key, which is returned too (compare it with the one your
        organizer published: a key fetched from the same daemon proves nothing against it).
        """
        reply = self._unary(
            self._ledger.Prove,
            _l.ProveRequest(holdout=holdout, entry_hash=entry_hash or "", first_size=since),
        )
        return Proof(
            checkpoint=reply.checkpoint,
            inclusion_proof=reply.inclusion_proof or None,
            consistency_proof=reply.consistency_proof or None,
            verifier_key=reply.verifier_key,
        )

    def withdraw(self, name: str, reason: str = "") -> dict:
        """Withdraws a holdout that released nothing (custodian and organizer: the first call
        records a request, the other role's completes it; one call with both roles). Returns
        ``{"completed": bool, "message": str, "holdout": HoldoutInfo}``. Refused with
        ``HoldoutError`` (exit code 7) once anything was answered or sealed."""
        reply = self._unary(
            self._holdouts.WithdrawHoldout, _h.WithdrawHoldoutRequest(name=name, reason=reason)
        )
        return {
            "completed": reply.completed,
            "message": reply.message,
            "holdout": _holdout_info(reply.holdout),
        }
