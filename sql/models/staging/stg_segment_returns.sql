-- segment_returns as given (optional; an empty relation when not given): the portfolio's own
-- return inside each asset class and period. Rename and cast only.
with source as (
    select * from segment_returns
),

renamed as (
    select
        cast(portfolio_id as varchar) as portfolio_id,
        cast(period_end as date) as period_end,
        cast(asset_class as varchar) as asset_class,
        cast("return" as double) as segment_return
    from source
)

select * from renamed
