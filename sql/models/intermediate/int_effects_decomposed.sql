-- The per-period, per-class effects (DESIGN §3). With w the weight held, s the static
-- weight, q the policy weight, b the index return, r the segment return (the index return
-- where missing) and B = sum_i q b the policy return:
--   form 'bf'  (Brinson & Fachler 1985, JPM 11(3)): static allocation (s - q)(b - B),
--              timing (w - s)(b - B), selection w (r - b) (interaction folded in);
--   form 'bhb' (Brinson, Hood & Beebower 1986, FAJ 42(4)): static (s - q) b, timing
--              (w - s) b, selection q (r - b), interaction (w - q)(r - b).
-- Selection and interaction are null for a portfolio without segment returns, and for a
-- class-period held (w <> 0) whose segment return is missing (segment_return_missing).
with weights as (
    select * from int_weights_static_averaged
),

run_options as (
    select * from stg_run_options
),

with_policy_return as (
    select
        portfolio_id,
        period_index,
        period_start,
        period_end,
        asset_class,
        is_holding,
        has_segments,
        weight,
        static_weight,
        policy_weight,
        index_return,
        segment_return,
        coalesce(segment_return, index_return) as return_used,
        has_segments and segment_return is null and weight <> 0 as is_segment_missing,
        sum(policy_weight * index_return) over (
            partition by portfolio_id, period_index
        ) as policy_return
    from weights
),

decomposed as (
    select
        w.portfolio_id,
        w.period_index,
        w.period_start,
        w.period_end,
        w.asset_class,
        w.weight,
        w.static_weight,
        w.policy_weight,
        w.index_return,
        w.segment_return,
        w.policy_return,
        case
            when o.form = 'bhb' then (w.static_weight - w.policy_weight) * w.index_return
            else (w.static_weight - w.policy_weight) * (w.index_return - w.policy_return)
        end as static_allocation,
        case
            when o.form = 'bhb' then (w.weight - w.static_weight) * w.index_return
            else (w.weight - w.static_weight) * (w.index_return - w.policy_return)
        end as timing,
        case
            when not w.has_segments or w.is_segment_missing then cast(null as double)
            when o.form = 'bhb' then w.policy_weight * (w.return_used - w.index_return)
            else w.weight * (w.return_used - w.index_return)
        end as selection,
        case
            when o.form = 'bhb' and w.has_segments and not w.is_segment_missing
                then (w.weight - w.policy_weight) * (w.return_used - w.index_return)
            else cast(null as double)
        end as interaction,
        not w.is_holding as is_drifted,
        w.has_segments,
        w.is_segment_missing,
        w.weight * w.return_used as weighted_return
    from with_policy_return as w
    cross join run_options as o
)

select * from decomposed
