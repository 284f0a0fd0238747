-- Identity check per portfolio-period: the class effects plus the residual must add up to
-- the active return. Rows appear here only where they do not (to 1e-10); empty means sound.
with effects as (
    select * from effects
),

series as (
    select * from series
),

class_sums as (
    select
        portfolio_id,
        period_end,
        sum(static_allocation) + sum(timing)
        + coalesce(sum(selection), 0) + coalesce(sum(interaction), 0) as effects_total
    from effects
    group by portfolio_id, period_end
),

compared as (
    select
        s.portfolio_id,
        s.period_end,
        s.active_return,
        c.effects_total + s.residual as explained,
        s.active_return - (c.effects_total + s.residual) as gap
    from series as s
    inner join class_sums as c
        on s.portfolio_id = c.portfolio_id and s.period_end = c.period_end
)

select * from compared
where abs(gap) > 1e-10
